"""Fused passes: steps reading the same input run one task per tile and give exactly the unfused products;
the ledger, resume and invalidation stay per step; groups are cut by the memory their tasks need."""
from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pytest

import engine_script as es
from swathmill.tiles.executors import LocalExecutor
from swathmill.tiles.fuse import fusable, fusion_groups, split_by_memory, task_memory
from swathmill.tiles.ledger import Ledger
from swathmill.tiles.ops import band_transform_step, mean_filter_step
from swathmill.tiles.run import Run, RunOptions
from swathmill.tiles.step import Block, Fit, OutputSpec, Step
from swathmill.tiles.testing import read_output

__all__: list[str] = []


def _raw_kernel(block: Block, model: Any) -> dict:
    # stored values (decode=False): int16 band 0 doubled, nodata kept
    x = block.data["x"][:1].astype(np.int32)
    return {"output": np.where(x == -9999, -9999, np.clip(x * 2, -9998, 32767)).astype(np.int16)}


def _raw_outputs(meta: dict, model: Any, params: Any) -> dict:
    s = meta["x"].spec
    return {"output": OutputSpec(bands=s.bands[:1], dtype="int16", nodata=-9999, attrs={"scale_factor": 1e-4})}


def _steps(size: int = 5) -> list[Step]:
    """Five steps on src/refl (halos 0 and 2, one fit, one raw reader), and one step on another input."""
    return [
        band_transform_step("scaled", "src/refl", scale=2.0),
        mean_filter_step("smooth", "src/refl", size=size),
        Step(name="centred", kernel=es._centre_kernel, outputs=es._same_as_input, inputs={"x": "src/refl"},
             fit=Fit(es._mean_accumulate, es._mean_merge, es._mean_finalize)),
        mean_filter_step("smooth2", "scaled/output", size=3),  # another input: its own pass
        es.failing_step("copy", "src/refl"),
        Step(name="raw", kernel=_raw_kernel, outputs=_raw_outputs, inputs={"x": "src/refl"}, decode=False),
    ]


def _run(run_dir: Path, steps: list[Step], fuse: bool, task_memory: int | None = None, export: bool = False):
    src = es.make_source(run_dir.with_name(run_dir.name + "-src.zarr"), shard=16)
    opts = RunOptions(tile=16, export=export, fuse=fuse, task_memory=task_memory, config_hash=es.CONFIG_HASH)
    with Run(run_dir, opts) as run:
        return run.execute(steps, LocalExecutor(), sources={"src": src})


def _outputs(run_dir: Path, names) -> dict[str, np.ndarray]:
    return {n: read_output(run_dir, f"{n}/output", raw=True) for n in names}


def test_groups_share_inputs_whatever_the_alias_and_keep_other_steps_apart():
    steps = _steps()
    groups = [[s.name for s in g] for g in fusion_groups(steps)]
    assert groups == [["scaled", "smooth", "centred", "copy", "raw"], ["smooth2"]]
    a = band_transform_step("a", "src/refl")
    b = Step(name="b", kernel=_raw_kernel, outputs=_raw_outputs, inputs={"other_alias": "src/refl"})
    assert fusable(a, b)
    assert not fusable(a, mean_filter_step("c", "a/output"))


def test_fused_equals_unfused_byte_for_byte(tmp_path):
    steps = _steps()
    fused = _run(tmp_path / "fused", steps, fuse=True, export=True)
    plain = _run(tmp_path / "plain", steps, fuse=False, export=True)
    assert fused.ok and plain.ok
    assert any("fused pass over 20 tiles" in m for m in fused.messages), fused.messages
    assert not any("fused pass" in m for m in plain.messages)
    names = [s.name for s in steps]
    a, b = _outputs(tmp_path / "fused", names), _outputs(tmp_path / "plain", names)
    for n in names:
        assert a[n].dtype == b[n].dtype
        assert a[n].tobytes() == b[n].tobytes(), n  # stored values, bit for bit
    # the products: same pixels (tags differ only by their creation time)
    import rasterio
    for p in sorted((tmp_path / "plain" / "products").glob("*.tif")):
        with rasterio.open(p) as x, rasterio.open(tmp_path / "fused" / "products" / p.name) as y:
            assert x.read().tobytes() == y.read().tobytes(), p.name
    # keys do not depend on fusion: a run made one way resumes the other way with nothing to do
    again = _run(tmp_path / "plain", steps, fuse=True)
    assert again.ok and all(s.computed == 0 and s.done_before == s.total for s in again.steps)


def test_the_ledger_stays_per_step_and_a_failing_member_does_not_stop_the_others(tmp_path):
    steps = _steps()
    es.FAIL_TILES.clear()
    es.FAIL_TILES.add((1, 2))
    try:
        r1 = _run(tmp_path / "run", steps, fuse=True)
    finally:
        es.FAIL_TILES.clear()
    rep = {s.name: s for s in r1.steps}
    assert r1.stopped_at == "copy"
    assert list(rep["copy"].failed) == [(1, 2)] and rep["copy"].computed == 19
    for n in ("scaled", "smooth", "centred", "raw"):
        assert rep[n].complete and rep[n].computed == 20, n
    assert "smooth2" not in rep  # after the group that did not finish
    led = Ledger(tmp_path / "run" / "ledger.sqlite")
    try:
        assert len(led.done("copy", rep["copy"].key)) == 19
        assert len(led.done("raw", rep["raw"].key)) == 20
    finally:
        led.close()
    # the rerun recomputes the one missing tile of the one step, then the later step
    r2 = _run(tmp_path / "run", steps, fuse=True)
    rep2 = {s.name: s for s in r2.steps}
    assert r2.ok
    assert rep2["copy"].computed == 1 and rep2["copy"].done_before == 19
    assert all(rep2[n].computed == 0 for n in ("scaled", "smooth", "centred", "raw"))
    assert rep2["smooth2"].computed == 20


def test_a_changed_parameter_reruns_that_step_alone(tmp_path):
    r1 = _run(tmp_path / "run", _steps(size=5), fuse=True)
    assert r1.ok
    before = _outputs(tmp_path / "run", ["scaled", "raw"])
    r2 = _run(tmp_path / "run", _steps(size=3), fuse=True)
    rep = {s.name: s for s in r2.steps}
    assert rep["smooth"].invalidated and rep["smooth"].computed == 20
    for n in ("scaled", "centred", "copy", "raw", "smooth2"):
        assert rep[n].computed == 0 and rep[n].invalidated is None, n
    after = _outputs(tmp_path / "run", ["scaled", "raw"])
    assert all(before[n].tobytes() == after[n].tobytes() for n in before)
    # and the recomputed step equals a fresh unfused run of the new parameter
    fresh = _run(tmp_path / "fresh", _steps(size=3), fuse=False)
    assert fresh.ok
    assert (read_output(tmp_path / "run", "smooth/output", raw=True).tobytes()
            == read_output(tmp_path / "fresh", "smooth/output", raw=True).tobytes())


def test_a_group_is_cut_where_the_memory_limit_would_be_passed(tmp_path):
    # limits chosen from the engine's own estimate: the shared block plus one member fits, a bigger one not
    members = ["a", "b", "c"]
    mem = {"a": 100, "b": 300, "c": 150}
    assert split_by_memory(members, mem, shared=50, limit=None) == [members]
    assert split_by_memory(members, mem, shared=50, limit=250) == [["a", "c"], ["b"]]
    assert split_by_memory(members, mem, shared=50, limit=10) == [["a"], ["b"], ["c"]]
    # a limit below any member's need runs every step unfused, with the same products
    r = _run(tmp_path / "tight", _steps(), fuse=True, task_memory=1)
    assert r.ok and not any("fused pass" in m for m in r.messages)
    ref = _run(tmp_path / "ref", _steps(), fuse=False)
    names = [s.name for s in _steps()]
    a, b = _outputs(tmp_path / "tight", names), _outputs(tmp_path / "ref", names)
    assert all(a[n].tobytes() == b[n].tobytes() for n in names)


def test_task_memory_counts_the_declared_bands():
    spec = OutputSpec(bands=tuple("abcd"), dtype="int16", nodata=-9999)
    out = OutputSpec(bands=("x",), dtype="uint8", nodata=0)
    m = task_memory((10, 10), [spec], [out], core=(8, 8))
    # by hand: 100 px * (8 stored + 16 decoded * 3 + 2) + 64 px * (8 + 1 + 1)
    assert m == 100 * (8 + 16 * 3 + 2) + 64 * 10
    assert task_memory((10, 10), [spec, spec], [out], core=(8, 8)) > m


def test_the_pipeline_gives_the_same_products_fused_and_unfused(tmp_path, capsys):
    """A demo-like run (mosaic with brightness matching, PCA, spectral angle, feature fitting, unmixing,
    features) through the command line, with engine.fuse on and off: every store identical bit for bit."""
    import rasterio
    import test_cli as tc
    from swathmill.tiles.store import open_store
    from swathmill.workflows.app.cli import main

    wl = np.linspace(400, 2500, 60)
    lib = tmp_path / "lib.csv"
    a = 0.15 + 0.1 * np.sin(wl / 250.0)
    b = 0.35 + 0.05 * np.cos(wl / 400.0) - 0.1 * np.exp(-((wl - 2200) / 40) ** 2)
    c = 0.25 + 0.2 * (wl - 400) / 2100
    lib.write_text("wavelength_nm,a,b,c\n" + "\n".join(f"{w},{x},{y},{z}" for w, x, y, z in zip(wl, a, b, c)))
    over = dict(classify={"sam": {"references": {"library": "lib.csv"}, "threshold": None},
                          "sff": {"references": {"library": "lib.csv", "materials": ["b"]},
                                  "range": [2000.0, 2400.0]}},
                unmix={"method": "sum_to_one", "endmembers": {"library": "lib.csv"}, "input": "mosaic/reflectance"},
                features={"name": "feat", "input": "mosaic/reflectance",
                          "features": [{"kind": "normalized_difference", "name": "nd", "a": 860, "b": 660}]})
    cfg = tc._config(tmp_path, **over)
    assert main(["run", str(cfg), "--plain"]) == 0
    said = capsys.readouterr()
    assert "fused pass over 12 tiles for steps pca, sam, sff, unmix, feat" in said.out + said.err
    cfg = tc._config(tmp_path, run_dir="plain", engine={"tile": 16, "chunk": 16, "fuse": False}, **over)
    assert main(["run", str(cfg), "--plain"]) == 0
    capsys.readouterr()
    fused, plain = tmp_path / "run", tmp_path / "plain"
    stores = sorted(p.name for p in (plain / "stores").glob("*.zarr"))
    assert {"mosaic.zarr", "pca.zarr", "sam.zarr", "sff.zarr", "unmix.zarr", "feat.zarr"} <= set(stores), stores
    for name in stores:
        x, y = open_store(plain / "stores" / name), open_store(fused / "stores" / name)
        assert x.specs == y.specs, name
        for o in x.specs:
            assert x.read(o, x.grid.full).tobytes() == y.read(o, y.grid.full).tobytes(), (name, o)
    for p in sorted((plain / "products").glob("*.tif")):
        with rasterio.open(p) as x, rasterio.open(fused / "products" / p.name) as y:
            assert x.read().tobytes() == y.read().tobytes(), p.name
