"""The project installs as one package, ``swathmill``: its wheel, its version, ``python -m swathmill``."""
from __future__ import annotations

import importlib.util
import subprocess
import sys
import zipfile
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


def test_version_and_module_entry_point():
    import swathmill
    from swathmill.tiles.run import ENGINE_VERSION

    assert swathmill.__version__ == ENGINE_VERSION
    out = subprocess.run([sys.executable, "-m", "swathmill", "--version"], capture_output=True, text=True,
                         timeout=120, cwd=ROOT.parent)
    assert out.returncode == 0 and out.stdout.strip() == f"swathmill {swathmill.__version__}"


def test_importing_the_root_loads_nothing_heavy():
    code = "import sys, swathmill; print(sorted(m for m in ('zarr', 'dask', 'numpy') if m in sys.modules))"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=60, cwd=ROOT.parent)
    assert out.returncode == 0 and out.stdout.strip() == "[]"


def _setuptools_major() -> int:
    if importlib.util.find_spec("setuptools") is None:
        return 0
    import setuptools

    return int(setuptools.__version__.split(".")[0])


@pytest.mark.skipif(_setuptools_major() < 77, reason="setuptools 77+ (the test extra) is needed to build the wheel")
def test_wheel_holds_only_the_swathmill_package(tmp_path):
    out = subprocess.run([sys.executable, "-m", "pip", "wheel", "--no-deps", "--no-build-isolation", "-q",
                          "-w", str(tmp_path), str(ROOT)], capture_output=True, text=True, timeout=300)
    assert out.returncode == 0, out.stderr[-2000:]
    (wheel,) = tmp_path.glob("swathmill-*.whl")
    with zipfile.ZipFile(wheel) as z:
        names = z.namelist()
        top = {n.split("/")[0] for n in names}
        assert {t for t in top if not t.endswith(".dist-info")} == {"swathmill"}
        info = next(t for t in top if t.endswith(".dist-info"))
        assert z.read(f"{info}/top_level.txt").decode().split() == ["swathmill"]
    assert "swathmill/py.typed" in names and "swathmill/__main__.py" in names
    assert "swathmill/tiles/run.py" in names and "swathmill/workflows/app/cli.py" in names
    assert not any(n.startswith("swathmill/workflows/_package") for n in names)
