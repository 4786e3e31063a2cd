"""A contract every registered step passes, applied to a table of step factories on small synthetic inputs.

For each case (one per registered step kind and method): tiled equals untiled (tiles near the halo size
against one tile over the whole grid); the local executor equals the Dask executor (byte for byte); the
declared outputs match what the step writes (names, dtypes, band counts); the step's identity (what its
key hashes) is the same in another process and changes with every parameter of its section (each field
perturbed every valid way); and, for a representative subset (see ``KILL_CASES``), a run killed with
SIGKILL during the step and run again gives stores identical to an uninterrupted run.

Run as a script (``python tests/test_contract.py CASE BASE_DIR SLEEP``) it runs one case slowly in
``BASE_DIR/killed`` for the kill test.
"""
from __future__ import annotations

import dataclasses
import functools
import json
import signal
import sqlite3
import subprocess
import sys
import time
import types
import typing
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable

import numpy as np
import pytest

TESTS = Path(__file__).resolve().parent
if str(TESTS) not in sys.path:  # the script form imports its sibling test helpers
    sys.path.insert(0, str(TESTS))

from swathmill.tiles.executors import LocalExecutor  # noqa: E402
from swathmill.tiles.ops import FilterParams, ModalFilterParams, mean_filter_step, modal_filter_step  # noqa: E402
from swathmill.tiles.run import Run, RunOptions  # noqa: E402
from swathmill.tiles.step import OutputSpec, Step, canonical_json  # noqa: E402
from swathmill.tiles.testing import default_grid, run_on_arrays, write_source_store  # noqa: E402

__all__: list[str] = []

ROWS, COLS = 40, 48
WL = np.linspace(2000.0, 2400.0, 24)
Data = dict[str, tuple[np.ndarray, OutputSpec]]


# inputs ---------------------------------------------------------------------------------------------
def _cube(seed: int = 3) -> Data:
    rng = np.random.default_rng(seed)
    base = 0.4 + 0.1 * np.sin(WL / 60.0)[:, None, None]
    dip = np.exp(-0.5 * ((WL - 2200.0) / 25.0) ** 2)[:, None, None] * rng.uniform(0.0, 0.3, (1, ROWS, COLS))
    cube = (base - dip + rng.normal(0, 0.005, (WL.size, ROWS, COLS))).astype(np.float32)
    spec = OutputSpec(bands=tuple(f"b{i + 1:03d}" for i in range(WL.size)), dtype="float32", nodata=float("nan"),
                      coords={"wavelength": tuple(WL.tolist())})
    return {"cube": (cube, spec)}


def _classes() -> Data:
    rng = np.random.default_rng(5)
    cls = rng.integers(0, 4, (1, ROWS, COLS)).astype(np.uint8)
    return {"cube": (cls, OutputSpec(bands=("class",), dtype="uint8", nodata=0, kind="categorical",
                                     class_names=("a", "b", "c")))}


def _float_spec(n: int, **kw: Any) -> OutputSpec:
    return OutputSpec(bands=tuple(f"b{i + 1:03d}" for i in range(n)), dtype="float32", nodata=float("nan"), **kw)


def _patches() -> Data:
    import test_classify as tc

    cube, spec, _labels = tc.scene(noise=0.004)
    return {"cube": (cube, spec)}


def _mixtures() -> Data:
    import test_unmix as tu

    _m, x = tu._scene(np.random.default_rng(11))
    return {"cube": (x, _float_spec(x.shape[0]))}


def _simplex() -> Data:
    import test_endmembers as te

    x, red, _pure, _m = te.simplex_scene(np.random.default_rng(12), noise=0.01, rows=48, cols=40)
    red[:, 20:23, 30:34] = np.nan  # nodata
    return {"red": (red, _float_spec(red.shape[0])), "cube": (x, _float_spec(x.shape[0]))}


def _predictors() -> Data:
    import test_calibration as tcal

    f, spec = tcal._predictor_map(np.random.default_rng(13))
    return {"feat": (f, spec)}


def _separable() -> Data:
    import test_bandselect as tb

    cube, spec, _table, _wl = tb._scene(np.random.default_rng(14))
    return {"cube": (cube, spec)}


def _canopy_cube() -> Data:
    import test_rtm as tr

    cube, _lai, _cab = tr._scene()
    return {"cube": (cube, tr._spec(tr.WL.size))}


# step factories: section -> steps -----------------------------------------------------------------
def _features_section():
    from swathmill.workflows.methods.features import FeaturesConfig

    return FeaturesConfig.model_validate({"input": "src/cube", "features": [
        {"kind": "band_depth", "name": "depth", "range": [2080, 2320]},
        {"kind": "normalized_difference", "name": "nd", "a": 2100, "b": [2190, 2210]}]})


def _features(section):
    from swathmill.workflows.methods.features import build_steps

    return build_steps(section)


def _mnf_section(**kw):
    from swathmill.workflows.methods.mnf import MnfConfig

    return lambda: MnfConfig.model_validate(kw)


def _mnf(section):
    from swathmill.workflows.methods.mnf import mnf_steps

    return mnf_steps(section, "src/cube")


@functools.cache
def _library():
    import test_classify as tc

    return tc.library()


@functools.cache
def _table():
    import test_classify as tc

    return tc.patch_samples()


def _sam_section():
    from swathmill.workflows.methods.classify.sam import SamSettings

    return SamSettings(threshold=0.1)


def _sam_auto_section():
    """A spectral angle on training-sample references taking its number of features from the curve."""
    from swathmill.workflows.methods.classify.sam import SamSettings

    return SamSettings(threshold=0.1, components="auto", folds=3, curve_max=6)


def _sam_compare_section():
    """A spectral angle recording its curve beside another input's (curve_compare needs the curve)."""
    from swathmill.workflows.methods.classify.sam import SamSettings

    return SamSettings(threshold=0.1, curve=True, folds=3, curve_compare=["src/other"])


def _sam(section):
    from swathmill.workflows.methods.classify.sam import sam_step

    return [sam_step("sam", "src/cube", library=_library(), settings=section)]


def _sam_image(section):
    from swathmill.workflows.methods.classify.sam import sam_step

    return [sam_step("sam_img", "src/cube", samples=_table(), settings=section)]


def _sff_section():
    from swathmill.workflows.methods.classify.sff import SffSettings

    return SffSettings(range=(2100.0, 2400.0))


def _sff(section):
    from swathmill.workflows.methods.classify.sff import sff_step

    return [sff_step("sff", "src/cube", library=_library(), settings=section)]


def _svm_section():
    from swathmill.workflows.methods.classify.svm import SvmSettings

    return SvmSettings(C=[1.0, 100.0], gamma=[1e-3, 1e-1], folds=3, probability=True)


def _svm_compare_section():
    """An SVM that records its feature-count curve against another input (curve_compare needs the curve)."""
    from swathmill.workflows.methods.classify.svm import SvmSettings

    return SvmSettings(C=[1.0, 100.0], gamma=[1e-3, 1e-1], folds=3, curve=True, curve_compare=["src/other"])


def _svm(section):
    from swathmill.workflows.methods.classify.svm import svm_step

    return [svm_step("svm", "src/cube", samples=_table(), settings=section)]


def _unmix_section(method: str):
    def make():
        from swathmill.workflows.methods.unmix import UnmixSettings

        return UnmixSettings(method=method)
    return make


@functools.cache
def _endmember_matrix() -> np.ndarray:
    import test_unmix as tu

    return tu._scene(np.random.default_rng(11))[0]


def _unmix(section):
    from swathmill.workflows.methods.unmix import unmix_step

    m = _endmember_matrix()
    return [unmix_step("unmix", "src/cube", settings=section, endmembers=m, names=["soil", "grass", "water"])]


def _extraction_section(method: str):
    def make():
        from swathmill.workflows.methods.endmembers import ExtractionSettings

        return ExtractionSettings(method=method, n_endmembers=4, seed=7, n_directions=64)
    return make


def _endmembers(section):
    from swathmill.workflows.methods.endmembers import endmember_fit_step

    return [endmember_fit_step("em", "src/red", "src/cube", settings=section)]


def _calibration_section(method: str, by_wavelength: bool = False):
    def make():
        from swathmill.workflows.methods.calibration import CalibrationConfig

        extra = {"svr": {"C": [10.0], "gamma": ["scale"], "epsilon": [0.05]},
                 "pls": {"n_components": 2}, "linear": {}}[method]
        extra.update({"wavelength_ranges": [(1000.0, 1100.0)]} if by_wavelength else {"bands": ["depth", "area"]})
        return CalibrationConfig.model_validate({
            "name": "clay", "quantity": "clay", "units": "%", "method": method, "input": "src/feat",
            "cv": {"folds": 3, "seed": 2}, **extra})
    return make


def _calibration(section):
    from swathmill.workflows.methods.calibration import CalibrationSamples, build_steps

    (f, _spec), = _predictors().values()
    rng = np.random.default_rng(21)
    flat = rng.choice(f.shape[1] * f.shape[2], 50, replace=False)
    rows, cols = flat // f.shape[2], flat % f.shape[2]
    values = 2.0 + 4.0 * f[0, rows, cols] - 1.5 * f[1, rows, cols] + rng.normal(0, 0.05, rows.size)
    samples = CalibrationSamples(rows=rows, cols=cols, values=values, groups=np.arange(rows.size) % 5)
    return build_steps(section, samples)


def _bands_section(method: str):
    def make():
        from swathmill.workflows.methods.bandselect import BandSelectionConfig

        if method == "sffs":
            return BandSelectionConfig(name="bands", input="src/cube", n_bands=3, exclude=[(1700, 1800)],
                                       reference={"path": "unused.csv"}, folds=3)
        return BandSelectionConfig(name="bands", input="src/cube", method="linear_prediction", n_bands=4,
                                   exclude=[], sample_pixels=300)
    return make


@functools.cache
def _band_samples():
    import test_bandselect as tb

    return tb._scene(np.random.default_rng(14))[2]


def _bands(section):
    from swathmill.workflows.methods.bandselect import band_selection_step

    table = _band_samples()
    return [band_selection_step(section, table if section.method == "sffs" else None)]


def _canopy_section():
    import test_rtm as tr
    from swathmill.workflows.methods.rtm import CanopyConfig

    return CanopyConfig(**tr.CFG)


def _canopy_lines_section():
    """A canopy section with sun and view angles per flight line (the second line on the section's own)."""
    import test_rtm as tr
    from swathmill.workflows.methods.rtm import CanopyConfig

    return CanopyConfig(**tr.CFG, line_geometry=[{"sun_zenith": 40.0}, None])


def _canopy(section):
    from swathmill.workflows.methods.rtm import canopy_step

    return [canopy_step(section)]


@dataclass(frozen=True)
class Case:
    name: str
    section: Callable[[], Any]  # the step's parameter set (a Section, or the engine's frozen dataclass)
    build: Callable[[Any], list[Step]]  # section -> the steps
    data: Callable[[], Data]
    exact: bool = False  # every output equal (integer maps); floats otherwise to 1e-5
    also: tuple[Callable[[], Any], ...] = ()  # more parameter sets for the key test only (exclusive keys)


CASES = [
    Case("features", _features_section, _features, _cube),
    Case("mean_filter", lambda: FilterParams(size=5),
         lambda p: [mean_filter_step("smooth", "src/cube", size=p.size)], _cube),
    Case("modal_filter", lambda: ModalFilterParams(size=3, n_classes=3),
         lambda p: [modal_filter_step("modal", "src/cube", size=p.size, n_classes=p.n_classes)], _classes,
         exact=True),
    Case("mnf", _mnf_section(), _mnf, _cube),
    Case("pca", _mnf_section(method="pca", components=4), _mnf, _cube),
    Case("mnf_denoise", _mnf_section(components=6, denoise_components=3), _mnf, _cube),
    Case("sam", _sam_section, _sam, _patches),
    Case("sam_image", _sam_section, _sam_image, _patches),
    Case("sam_image_auto", _sam_auto_section, _sam_image, _patches, also=(_sam_compare_section,)),
    Case("sff", _sff_section, _sff, _patches),
    Case("svm", _svm_section, _svm, _patches, also=(_svm_compare_section,)),
    *(Case(f"unmix_{m}", _unmix_section(m), _unmix, _mixtures)
      for m in ("unconstrained", "sum_to_one", "nonnegative", "fully_constrained")),
    *(Case(f"endmembers_{m}", _extraction_section(m), _endmembers, _simplex) for m in ("atgp", "nfindr", "vca")),
    *(Case(f"calibration_{m}", _calibration_section(m), _calibration, _predictors,
           also=(_calibration_section(m, by_wavelength=True),) if m == "pls" else ())
      for m in ("linear", "pls", "svr")),
    Case("bands_sffs", _bands_section("sffs"), _bands, _separable),
    Case("bands_linear_prediction", _bands_section("linear_prediction"), _bands, _separable),
    Case("canopy", _canopy_section, _canopy, _canopy_cube, also=(_canopy_lines_section,)),
]
BY_NAME = {c.name: c for c in CASES}
# The kill test runs a subprocess per case (a few seconds of start-up each, more on a shared machine),
# so it covers one case of each shape of step rather than all: with a halo (mean filter), a fit and a
# second step reading the first (MNF + denoise), a trained model read from the ledger's model files
# (SVM) and a per-pixel iterative solver (fully constrained unmixing). The other steps finish tiles
# through the same engine path (Run: pending tiles, compute, record), which these cases exercise.
KILL_CASES = ["mean_filter", "mnf_denoise", "svm", "unmix_fully_constrained"]


def _steps(case: Case) -> list[Step]:
    return case.build(case.section())


def _tile(steps: list[Step]) -> int:
    """Tiles near the halo size (8 px for halos up to 8); 16 px where no step reads a halo (fewer tasks,
    so the suite stays short on a shared machine)."""
    halo = max(s.halo for s in steps)
    return 16 if halo == 0 else max(8, 8 * ((halo + 7) // 8))


# fixtures -------------------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def dask_executor():
    """One LocalCluster of 2 worker processes, 1 thread each, for the module (as in test_dask.py)."""
    from swathmill.tiles.executors import DaskExecutor

    ex = DaskExecutor(n_workers=2, threads_per_worker=1)
    try:
        yield ex
    finally:
        ex.close()


@pytest.fixture(scope="module", params=CASES, ids=[c.name for c in CASES])
def runs(request, tmp_path_factory):
    case: Case = request.param
    tmp = tmp_path_factory.mktemp(case.name)
    data = case.data()
    steps = _steps(case)
    tile = _tile(steps)
    tiled, r1 = run_on_arrays(steps, data, tmp, tile=tile, run_name="tiled")
    whole, r2 = run_on_arrays(_steps(case), data, tmp, tile=64, run_name="whole")
    assert r1.ok and r2.ok
    return case, steps, tiled, whole, tmp, tile


def test_tiled_equals_untiled(runs):
    case, steps, tiled, whole, _, _ = runs
    assert tiled.keys() == whole.keys()
    assert len(tiled) >= len(steps)
    for ref in tiled:
        a, b = tiled[ref], whole[ref]
        if case.exact or a.dtype.kind in "iu":
            np.testing.assert_array_equal(a, b, err_msg=ref)
        else:
            # DESIGN.md invariant 1: tiled equals untiled (floats to 1e-6 relative; MNF's statistics are
            # merged in another order, so 1e-5 with an absolute floor for values near zero)
            np.testing.assert_allclose(a, b, rtol=1e-5, atol=1e-5, equal_nan=True, err_msg=ref)


def test_declared_outputs_match_the_stores(runs):
    from swathmill.tiles.store import TileStore

    case, steps, tiled, _, tmp, _ = runs
    for step in steps:
        store = TileStore(tmp / "tiled" / "stores" / f"{step.name}.zarr")
        assert store.specs, step.name
        for name, spec in store.specs.items():
            raw = store.read(name, store.grid.full)
            assert raw.dtype == np.dtype(spec.dtype), (step.name, name)
            assert raw.shape == (len(spec.bands), *store.grid.shape), (step.name, name)
            assert spec.role, (step.name, name)  # every output declares what it is for
        if not callable(step.outputs):
            assert set(store.specs) == set(step.outputs), step.name


def _store_arrays(run_dir: Path) -> dict[str, tuple[str, bytes]]:
    import zarr

    out = {}
    for p in sorted((run_dir / "stores").glob("*.zarr")):
        g = zarr.open_group(str(p), mode="r")
        for k, arr in g.arrays():
            a = arr[...]
            out[f"{p.name}/{k}"] = (str(a.dtype) + str(a.shape), a.tobytes())
        out[f"{p.name}/attrs"] = ("attrs", canonical_json(dict(g.attrs)).encode())
    return out


def _assert_identical_stores(a: Path, b: Path) -> None:
    """Every array of every store equal byte for byte, and the stores' attributes equal."""
    sa, sb = _store_arrays(a), _store_arrays(b)
    assert sa and sa.keys() == sb.keys()
    assert [k for k in sa if sa[k] != sb[k]] == []


def test_local_executor_equals_dask(runs, dask_executor):
    case, steps, _, _, tmp, tile = runs
    _out, res = run_on_arrays(_steps(case), case.data(), tmp, tile=tile, run_name="dask", executor=dask_executor)
    assert res.ok
    _assert_identical_stores(tmp / "tiled", tmp / "dask")


@pytest.fixture(scope="module")
def identities_elsewhere() -> dict[str, list[str]]:
    """Every case's step identities as another Python process builds them (one process for all)."""
    code = ("import json, sys; sys.path.insert(0, %r); import test_contract as t; "
            "from swathmill.tiles.step import canonical_json; "
            "print(json.dumps({c.name: [canonical_json(s.describe()) for s in t._steps(c)] for c in t.CASES}))"
            ) % str(TESTS)
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    return json.loads(out.strip().splitlines()[-1])


def test_step_identity_is_stable_across_processes(runs, identities_elsewhere):
    case, steps, _, _, _, _ = runs
    assert identities_elsewhere[case.name] == [canonical_json(s.describe()) for s in steps]


# every parameter changes the key ---------------------------------------------------------------------
def _literals(annotation: Any) -> list[Any]:
    if typing.get_origin(annotation) is typing.Literal:
        return list(typing.get_args(annotation))
    return [v for a in typing.get_args(annotation) for v in _literals(a)]


def _section_type(annotation: Any) -> type | None:
    from pydantic import BaseModel

    if isinstance(annotation, type) and issubclass(annotation, BaseModel):
        return annotation
    for a in typing.get_args(annotation):
        t = _section_type(a)
        if t is not None:
            return t
    return None


def _candidates(value: Any, annotation: Any) -> list[Any]:
    """Other values a field may take: the other literals, a nudged number, a flipped flag, a shorter or
    longer list, a set or unset optional, and each field of a nested section perturbed in turn."""
    out: list[Any] = [v for v in _literals(annotation) if v != value]
    nested = _section_type(annotation)
    if nested is not None:
        base = value if isinstance(value, dict) else {}
        for name, f in nested.model_fields.items():
            for c in _candidates(base.get(name, f.get_default(call_default_factory=True)), f.annotation):
                out.append({**base, name: c})
        out.append({"window": [1, 1, 10, 10]})  # an optional section given (e.g. the MNF noise area)
    if isinstance(value, bool):
        return out + [not value]
    if isinstance(value, int):
        return out + [value + 1, value + 2, value * 2, value - 1, 3]
    if isinstance(value, float):
        return out + [value * 1.5 + 0.01, value * 0.5, value - 0.05, 0.5]
    if isinstance(value, str):
        return out + ([value + "x"] if not _literals(annotation) else [0.5])  # e.g. "scale" or a number
    if isinstance(value, (list, tuple)):
        if value and all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in value):
            out += [[v + 10.0 for v in value], [value[0], value[-1] - 10.0]]
        if value:
            return out + [list(value[:-1]), [*value, value[-1]], list(reversed(value)) if len(value) > 1 else []]
        return out + [[(1000.0, 1100.0)], ["depth"], [0.5], ["lut"]]
    if isinstance(value, dict) and nested is None:
        return out + ([{}] if value else [{"alpha": 0.2}])
    if value is None:
        return out + [2, 0.5, 1, 3, True, "x", [(1000.0, 1100.0)], ["depth"], {"alpha": 0.2}]
    return out


def _perturbed(section: Any) -> typing.Iterator[tuple[str, Any]]:
    """(field, section with that field changed) for every valid change of every field."""
    if dataclasses.is_dataclass(section):
        hints = typing.get_type_hints(type(section))
        for f in dataclasses.fields(section):
            for c in _candidates(getattr(section, f.name), hints[f.name]):
                try:
                    yield f.name, dataclasses.replace(section, **{f.name: c})
                except (ValueError, TypeError):
                    continue
        return
    from pydantic import ValidationError

    dump = section.model_dump()
    for name, f in type(section).model_fields.items():
        for c in _candidates(dump[name], f.annotation):
            try:
                yield name, type(section).model_validate({**dump, name: c})
            except (ValidationError, ValueError, TypeError):
                continue


def _section_groups() -> dict[str, list[Case]]:
    """Cases by the type of their parameter set: fields that exclude each other (MNF's three rules for
    the kept components, SVR-only or PLS-only keys, shade with the sum-to-one methods) are perturbed in
    the case where they apply."""
    groups: dict[str, list[Case]] = {}
    for c in CASES:
        groups.setdefault(type(c.section()).__name__, []).append(c)
    return groups


SECTION_GROUPS = _section_groups()


@pytest.mark.parametrize("group", list(SECTION_GROUPS))
def test_every_parameter_changes_the_step_key(group):
    from swathmill.errors import SwathmillError

    fields: set[str] = set()
    changed: set[str] = set()
    for case, section in ((c, make()) for c in SECTION_GROUPS[group] for make in (c.section, *c.also)):
        here = canonical_json([s.describe() for s in case.build(section)])
        fields |= set(type(section).model_fields if hasattr(type(section), "model_fields")
                      else [f.name for f in dataclasses.fields(section)])
        for name, other in _perturbed(section):
            if other == section:
                continue
            try:
                steps = case.build(other)
            except SwathmillError:
                continue  # a change this factory refuses with its own clear error is not a valid variant
            assert canonical_json([s.describe() for s in steps]) != here, (case.name, name, other)
            changed.add(name)
    assert changed == fields, f"fields never perturbed validly: {fields - changed}"


# a kill during the step, then a rerun ---------------------------------------------------------------
def _run_in(base: Path, case: Case, run_name: str, executor: Any) -> Any:
    """Run the case in ``base/run_name`` on one source store ``base/src.zarr`` (written once)."""
    data = case.data()
    steps = _steps(case)
    tile = _tile(steps)
    first = next(iter(data.values()))[0]
    src = base / "src.zarr"
    if not (src / "zarr.json").is_file():
        write_source_store(src, data, default_grid(first.shape[-2], first.shape[-1]), shard=tile)
    with Run(base / run_name, RunOptions(tile=tile, chunk=tile, export=False)) as run:
        return run.execute(steps, executor, sources={"src": src})


def _done_count(ledger: Path) -> int:
    if not ledger.is_file():
        return 0
    try:
        db = sqlite3.connect(f"file:{ledger}?mode=ro", uri=True, timeout=1)
        try:
            return db.execute("SELECT count(*) FROM tiles WHERE status='done'").fetchone()[0]
        finally:
            db.close()
    except sqlite3.Error:
        return 0


@pytest.mark.parametrize("name", KILL_CASES)
def test_kill_during_the_step_then_rerun_gives_identical_stores(name, tmp_path):
    case = BY_NAME[name]
    ref = _run_in(tmp_path / "ref", case, "run", LocalExecutor())
    assert ref.ok
    n_total = sum(s.total for s in ref.steps)
    k = n_total - ref.steps[-1].total // 2  # inside the last step, not at its ends
    base = tmp_path / "cut"
    base.mkdir()
    with open(tmp_path / "child.err", "w") as err:
        proc = subprocess.Popen([sys.executable, __file__, name, str(base), "0.1"], stdout=subprocess.DEVNULL,
                                stderr=err)
    try:
        deadline = time.monotonic() + 120
        while _done_count(base / "run" / "ledger.sqlite") < k:
            assert proc.poll() is None, f"the run ended before the kill: {(tmp_path / 'child.err').read_text()}"
            assert time.monotonic() < deadline, "the run did not reach the kill point in time"
            time.sleep(0.005)
        proc.send_signal(signal.SIGKILL)
        assert proc.wait(timeout=30) == -signal.SIGKILL
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    assert k <= _done_count(base / "run" / "ledger.sqlite") < n_total  # killed during the step
    again = _run_in(base, case, "run", LocalExecutor())
    assert again.ok
    assert 0 < sum(s.computed for s in again.steps) < n_total  # finished tiles were kept
    _assert_identical_stores(tmp_path / "ref" / "run", base / "run")


def _main(argv: list[str]) -> int:
    """Run one case slowly (the kill test's child): CASE BASE_DIR SLEEP."""
    import engine_script as es

    name, base, sleep = argv
    return 0 if _run_in(Path(base), BY_NAME[name], "run", es.SlowLocalExecutor(float(sleep))).ok else 1


if __name__ == "__main__":
    sys.exit(_main(sys.argv[1:]))
