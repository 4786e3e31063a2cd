"""The command line and the configuration: runs, resume, status, bad input, the run lock."""
from __future__ import annotations

import json
import os
import socket
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import rasterio
import yaml
from affine import Affine

from swathmill.tiles.ledger import Ledger
from swathmill.workflows.app.cli import main

CRS = "EPSG:32633"
BANDS = 24
WL = np.linspace(420.0, 2450.0, BANDS)


def _write_line(path: Path, col0: int, cols: int, rows: int = 40, seed: int = 0, gain: float = 1.0) -> Path:
    rng = np.random.default_rng(seed)
    yy, xx = np.mgrid[0:rows, col0:col0 + cols]
    base = 0.2 + 0.1 * np.sin(xx / 7.0)[None] + 0.05 * np.cos(yy / 5.0)[None]
    spectra = base * (1.0 + 0.3 * np.sin(WL / 300.0))[:, None, None]
    data = np.round(gain * spectra * 10000 + rng.normal(0, 20, spectra.shape)).astype("int16")
    prof = {"driver": "GTiff", "width": cols, "height": rows, "count": BANDS, "dtype": "int16", "crs": CRS,
            "transform": Affine(10, 0, 400000 + 10 * col0, 0, -10, 5000000), "nodata": -9999}
    with rasterio.open(path, "w", **prof) as dst:
        dst.write(data)
        for b in range(BANDS):
            dst.update_tags(b + 1, wavelength=f"{WL[b]:.3f}", fwhm="85.0", wavelength_units="nm")
    return path


def _config(tmp: Path, **over) -> Path:
    lines = tmp / "lines"
    lines.mkdir(exist_ok=True)
    _write_line(lines / "a.tif", 0, 40, seed=1)
    _write_line(lines / "b.tif", 24, 40, seed=2, gain=1.05)
    cfg = {"name": "clitest", "run_dir": "run",
           "execution": {"executor": "local"},
           "engine": {"tile": 16, "chunk": 16},
           "mosaic": {"lines": ["lines/a.tif", "lines/b.tif"], "brightness_matching": True, "seed": 0},
           "mnf": {"method": "pca", "components": 4},
           "report": {"enabled": False}}
    for k, v in over.items():
        cfg[k] = v
    path = tmp / "run.yaml"
    path.write_text(yaml.safe_dump(cfg))
    return path


def _done_tiles(run_dir: Path) -> int:
    db = run_dir / "ledger.sqlite"
    if not db.is_file():
        return 0
    led = Ledger(db)
    try:
        return sum(len(led.done(s["name"], s["key"])) for s in led.steps())
    finally:
        led.close()


def test_run_resume_and_status(tmp_path, capsys):
    cfg = _config(tmp_path)
    assert main(["run", str(cfg), "--plain"]) == 0
    out = capsys.readouterr().out
    assert "run directory:" in out
    run_dir = tmp_path / "run"
    products = sorted(p.name for p in (run_dir / "products").glob("*.tif"))
    assert "mosaic__reflectance.tif" in products and "pca__components.tif" in products
    assert (run_dir / "products" / "collection.json").is_file()
    # a second run resumes: nothing is recomputed
    assert main(["run", str(cfg), "--plain"]) == 0
    out = capsys.readouterr().out
    assert "resuming" in out and "(12 resumed)" in out
    assert main(["status", str(run_dir), "--json"]) == 0
    status = json.loads(capsys.readouterr().out)
    steps = {s["step"]: s for s in status["steps"]}
    assert steps["mosaic"]["done"] == steps["mosaic"]["total"] == 12
    assert steps["pca"]["pending"] == 0 and steps["pca"]["failed"] == 0


def test_changed_parameter_says_what_is_recomputed(tmp_path, capsys):
    cfg = _config(tmp_path)
    assert main(["run", str(cfg), "--plain"]) == 0
    capsys.readouterr()
    cfg = _config(tmp_path, mnf={"method": "pca", "components": 3})
    assert main(["run", str(cfg), "--plain"]) == 0
    out = capsys.readouterr().out
    # the message names the changed key with its old and new value
    assert "step 'pca' changed since the last run (pca.components: 4 -> 3)" in out
    assert "step 'mosaic': resuming, 12 of 12" in out


@pytest.mark.parametrize("section, value, expected", [
    ("mnf", {"method": "pca", "componnts": 4}, "mnf.componnts: unknown key; did you mean 'components'?"),
    ("engine", {"tile": "big"}, "engine.tile: Input should be a valid integer"),
    ("execution", {"executor": "cloud"}, "execution.executor: Input should be 'local', 'dask' or 'jobqueue'"),
])
def test_config_errors_name_the_key(tmp_path, capsys, section, value, expected):
    cfg = _config(tmp_path, **{section: value})
    assert main(["run", str(cfg)]) == 2
    err = capsys.readouterr().err
    assert expected in err and str(cfg) in err
    assert not (tmp_path / "run").exists()


def test_unknown_top_level_key(tmp_path, capsys):
    cfg = _config(tmp_path, mosiac={})
    assert main(["run", str(cfg)]) == 2
    assert "mosiac: unknown key; did you mean 'mosaic'?" in capsys.readouterr().err


def test_missing_config_and_missing_line(tmp_path, capsys):
    assert main(["run", str(tmp_path / "nope.yaml")]) == 2
    assert "nope.yaml does not exist" in capsys.readouterr().err
    cfg = _config(tmp_path, mosaic={"lines": ["lines/a.tif", "lines/missing.tif"]})
    assert main(["run", str(cfg)]) == 2
    assert "missing.tif" in capsys.readouterr().err
    assert _done_tiles(tmp_path / "run") == 0


def test_unreadable_raster(tmp_path, capsys):
    cfg = _config(tmp_path)
    (tmp_path / "lines" / "b.tif").write_bytes(b"this is not a raster")
    assert main(["run", str(cfg)]) == 2
    assert "b.tif" in capsys.readouterr().err
    assert _done_tiles(tmp_path / "run") == 0


def test_tile_not_aligned_with_chunk(tmp_path, capsys):
    cfg = _config(tmp_path, engine={"tile": 24, "chunk": 16})
    assert main(["run", str(cfg)]) == 2
    err = capsys.readouterr().err
    assert "tile size 24 px is not a multiple of the chunk size 16 px" in err
    assert _done_tiles(tmp_path / "run") == 0


def test_halo_larger_than_tile(tmp_path, capsys):
    lib = tmp_path / "lib.csv"
    lib.write_text("wavelength_nm,dark,bright\n" + "\n".join(f"{w},{0.1},{0.4}" for w in np.linspace(400, 2500, 30)))
    cfg = _config(tmp_path, engine={"tile": 16, "chunk": 16},
                  classify={"sam": {"references": {"library": "lib.csv"}, "threshold": None},
                            "modal_filter": {"size": 35}})
    assert main(["run", str(cfg)]) == 2
    err = capsys.readouterr().err
    assert "halo of 17 px is larger than the tile size of 16 px" in err
    # the mosaic finished before the bad step was planned; no tile of the bad step is recorded
    led = Ledger(tmp_path / "run" / "ledger.sqlite")
    try:
        assert "sam_modal" not in {s["name"] for s in led.steps()}
    finally:
        led.close()


def test_second_process_is_refused(tmp_path, capsys):
    cfg = _config(tmp_path)
    run_dir = tmp_path / "run"
    run_dir.mkdir()
    # a live holder: this very process, on this host
    (run_dir / "run.lock").write_text(json.dumps({"host": socket.gethostname(), "pid": os.getpid(),
                                                  "token": "x", "started": "now"}))
    assert main(["run", str(cfg)]) == 3
    err = capsys.readouterr().err
    assert f"in use by process {os.getpid()} on host {socket.gethostname()}" in err


def test_failed_tiles_give_nonzero_exit_and_are_listed(tmp_path):
    import io

    from swathmill.tiles.run import RunResult, StepReport
    from swathmill.workflows.app.pipeline import _summarize

    rep = StepReport("sam", "k", total=4, done_before=1, computed=2, failed={(1, 0): "step 'sam', tile(1, 0): boom"})
    out = io.StringIO()
    code = _summarize(RunResult(steps=[rep], stopped_at="sam"), 1.0, tmp_path, out)
    assert code == 1
    text = out.getvalue()
    assert "1 tile(s) failed" in text and "sam tile (1, 0): step 'sam', tile(1, 0): boom" in text


@pytest.mark.parametrize("command", ["status", "report"])
@pytest.mark.parametrize("where", ["empty", "missing", "file"])
def test_status_and_report_of_a_non_run(tmp_path, capsys, command, where):
    target = {"empty": tmp_path, "missing": tmp_path / "nowhere", "file": tmp_path / "notes.txt"}[where]
    if where == "file":
        target.write_text("not a run")
    assert main([command, str(target)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and err.startswith("swathmill: error: ") and str(target) in err  # one line
    assert "Traceback" not in err


def test_help_explains_every_argument(capsys):
    for command in ("run", "status", "demo", "report"):
        with pytest.raises(SystemExit):
            main([command, "--help"])
        text = capsys.readouterr().out
        # every argument of the sub-command has a help text, and no markup reaches the terminal
        from swathmill.workflows.app.cli import _parser
        sub = _parser()._subparsers._group_actions[0].choices[command]
        for action in sub._actions:
            assert action.help, (command, action.dest)
        assert "``" not in text and "[bold]" not in text and ":func:" not in text


def test_warnings_are_one_line_on_console_and_in_the_log(tmp_path, capsys):
    import logging
    import warnings

    from swathmill.workflows.app.cli import WarningRelay

    log = logging.getLogger("swathmill")
    with WarningRelay():
        warnings.warn("ground reference x.geojson: 1 partly_outside\n  (9 px)", UserWarning, stacklevel=1)
        handler = logging.FileHandler(tmp_path / "run.log")
        log.addHandler(handler)
        log.setLevel(logging.INFO)
        try:
            log.info("step 'mosaic': resuming")  # the first run message writes the early warning too
        finally:
            log.removeHandler(handler)
            handler.close()
    err = capsys.readouterr().err
    assert err == "swathmill: warning: ground reference x.geojson: 1 partly_outside (9 px)\n"
    text = (tmp_path / "run.log").read_text()
    assert "ground reference x.geojson: 1 partly_outside (9 px)" in text and "warnings.warn" not in text


def test_console_script_runs(tmp_path):
    exe = Path(sys.executable).with_name("swathmill")
    if not exe.exists():
        pytest.skip("the swathmill console script is not installed next to this Python")
    r = subprocess.run([str(exe), "--version"], capture_output=True, text=True, timeout=60)
    assert r.returncode == 0 and r.stdout.startswith("swathmill ")


def test_shipped_configs_and_profiles_validate(tmp_path):
    from swathmill.workflows.app.config import ExecutionConfig, load_yaml, validate
    from swathmill.workflows.app.pipeline import load_run_config

    root = Path(__file__).resolve().parents[1] / "configs"
    cfg, _ = load_run_config(root / "example-campaign.yaml")
    assert cfg.mnf.components == 20 and cfg.classify.sam[0].threshold == 0.1
    for prof in ("laptop", "shared-server", "existing-scheduler", "batch-cluster"):
        ex = validate(ExecutionConfig, load_yaml(root / f"{prof}.yaml")["execution"], root / f"{prof}.yaml")
        assert ex.dashboard is None or ex.dashboard.startswith("127.0.0.1")
    # a run configuration may name a profile file instead of an execution mapping
    run = tmp_path / "r.yaml"
    run.write_text(yaml.safe_dump({"name": "p", "execution": str(root / "laptop.yaml"),
                                   "mosaic": {"lines": ["x.tif"]}}))
    cfg, _ = load_run_config(run)
    assert cfg.execution.workers == 2 and cfg.execution.memory_limit == "3GiB"


def test_library_unmixing_on_components_equals_unmixing_on_reflectance(tmp_path, capsys):
    """Sum-to-one unmixing is invariant to an orthonormal rotation about the mean (PCA with all
    components), so library endmembers transformed like the cube give the reflectance-space answer
    (least squares algebra; common practice)."""
    lib = tmp_path / "lib.csv"
    wl = np.linspace(400, 2500, 60)
    a = 0.15 + 0.1 * np.sin(wl / 250.0)
    b = 0.35 + 0.05 * np.cos(wl / 400.0)
    c = 0.25 + 0.2 * (wl - 400) / 2100
    lib.write_text("wavelength_nm,a,b,c\n" + "\n".join(f"{w},{x},{y},{z}" for w, x, y, z in zip(wl, a, b, c)))
    unmix = {"method": "sum_to_one", "endmembers": {"library": "lib.csv"}}
    cfg = _config(tmp_path, mnf={"method": "pca"}, unmix={**unmix, "input": "pca/components"})
    assert main(["run", str(cfg), "--plain"]) == 0
    cfg2 = _config(tmp_path, run_dir="run2", mnf={"method": "pca"}, unmix={**unmix, "input": "mosaic/reflectance"})
    assert main(["run", str(cfg2), "--plain"]) == 0
    from swathmill.tiles.testing import read_output

    on_pc = read_output(tmp_path / "run", "unmix/abundance")
    on_refl = read_output(tmp_path / "run2", "unmix/abundance")
    ok = np.isfinite(on_refl)
    # the grid is anchored to the tile size, so its edges may hold nodata: count within the mosaic's data
    from swathmill.tiles.store import open_store

    mst = open_store(tmp_path / "run2" / "stores" / "mosaic.zarr")
    assert ok[:, mst.read_valid(mst.grid.full).astype(bool)].mean() > 0.9
    np.testing.assert_allclose(on_pc[ok], on_refl[ok], atol=2e-4)


def test_dashboard_must_stay_on_this_machine(tmp_path, capsys):
    cfg = _config(tmp_path, execution={"executor": "dask", "dashboard": "0.0.0.0:8787"})
    assert main(["run", str(cfg)]) == 2
    assert "dashboard must be bound to this machine" in capsys.readouterr().err
    from swathmill.tiles.executors import _local_dashboard

    assert _local_dashboard(None) == "127.0.0.1:0" and _local_dashboard("localhost:8787") == "localhost:8787"
    with pytest.raises(ValueError, match="bound to this machine"):
        _local_dashboard(":8787")


def test_describe_changes_names_keys_inputs_and_version():
    from swathmill.tiles.ledger import describe_changes

    old = {"params": {"settings": {"threshold": 0.12, "exclude": []}}, "inputs": {"x": "mosaic/reflectance"},
           "in_keys": {"x": "k1"}, "version": "1.0", "tile": 64}
    new = {"params": {"settings": {"threshold": 0.10, "exclude": []}}, "inputs": {"x": "mosaic/reflectance"},
           "in_keys": {"x": "k2"}, "version": "1.1", "tile": 64}
    assert describe_changes("sam", old, new) == [
        "sam.settings.threshold: 0.12 -> 0.1",
        "input x (mosaic/reflectance) was recomputed",
        "software version: 1.0 -> 1.1",
    ]
    assert describe_changes("sam", old, old) == []
