"""The planner: ``swathmill plan`` counts tiles, tasks, passes, bytes, disk and memory without running
anything heavy; ``--probe`` times a few tiles; ``swathmill run`` refuses a run its disk cannot hold."""
from __future__ import annotations

import json
import shutil
from collections import namedtuple
from pathlib import Path

import numpy as np
import pytest

import test_cli as tc
from swathmill.tiles.grid import Tiling
from swathmill.tiles.plan import probe_tiles
from swathmill.workflows.app.cli import main

__all__: list[str] = []

FEATURES = {"name": "feat", "input": "mosaic/reflectance",
            "features": [{"kind": "normalized_difference", "name": "nd", "a": 860, "b": 660}]}


def _plan(capsys, cfg: Path, *extra: str) -> dict:
    assert main(["plan", str(cfg), "--json", *extra]) == 0
    return json.loads(capsys.readouterr().out)



def _grid_pixels(cfg: Path) -> int:
    """Pixels of the run's mosaic grid (the lines' extent anchored to whole tiles), as the pipeline builds it."""
    from swathmill.workflows.app.pipeline import build_mosaic, load_run_config

    run_cfg, _ = load_run_config(cfg)
    g = build_mosaic(run_cfg, cfg.parent).grid
    return g.rows * g.cols


def test_plan_counts_without_running(tmp_path, capsys):
    cfg = tc._config(tmp_path)
    plan = _plan(capsys, cfg)
    assert not (tmp_path / "run").exists()  # nothing written, not even the run directory
    steps = {s["step"]: s for s in plan["steps"]}
    assert list(steps) == ["mosaic", "pca"]
    # the mosaic grid of the two lines (40 rows, anchored to whole tiles; columns 0..64) in tiles of
    # 16 px: 3 x 4 tiles
    assert steps["mosaic"]["tiles"] == 12 and steps["pca"]["tiles"] == 12
    # the PCA fits over every tile, then computes every tile: 24 tasks
    assert steps["pca"]["fit_tiles"] == 12 and steps["pca"]["tasks"] == 24
    # the mosaic's store, uncompressed: int16 reflectance, the uint8 source layer and the uint8 valid mask
    assert steps["mosaic"]["bytes_written"] == _grid_pixels(cfg) * (tc.BANDS * 2 + 1 + 1)
    # PCA reads the mosaic once: its fit rides on the mosaic's own pass (accumulating each tile as it is
    # written), then its tiles; its outputs come from the fitted model, so without a probe they are
    # counted as float32 with as many bands as the input, and marked so
    assert plan["passes"] == {"mosaic": 1}
    assert steps["pca"]["outputs_guessed"]
    assert steps["pca"]["bytes_written"] == _grid_pixels(cfg) * (tc.BANDS * 4 + 1)
    # no probe: no time, sizes on disk with the documented ratio (1.0: no compression counted on)
    assert plan["run"]["seconds"] is None and steps["pca"]["ratio"] == 1.0
    assert plan["workers"] == 1 and plan["threads_per_worker"] == 1  # the local executor of the config
    assert plan["run"]["memory_per_worker"] > 0


def test_fusion_saves_passes_over_the_cube(tmp_path, capsys):
    cfg = tc._config(tmp_path, features=FEATURES)
    fused = _plan(capsys, cfg)
    cfg = tc._config(tmp_path, features=FEATURES, engine={"tile": 16, "chunk": 16, "fuse": False})
    plain = _plan(capsys, cfg)
    # unfused: PCA fit, PCA tiles, features tiles; fused: the PCA fit rides on the mosaic's pass, PCA and
    # features share the tile pass
    assert plain["passes"]["mosaic"] == 3 and fused["passes"]["mosaic"] == 1
    assert fused["run"]["bytes_read"] < plain["run"]["bytes_read"]


def test_probe_times_each_step_and_measures_what_a_run_writes(tmp_path, capsys):
    cfg = tc._config(tmp_path, features=FEATURES)
    plan = _plan(capsys, cfg, "--probe")
    steps = {s["step"]: s for s in plan["steps"]}
    assert not (tmp_path / "run").exists()  # the scratch folder is removed, and the folders made for it
    for name in ("mosaic", "pca", "feat"):
        s = steps[name]
        assert s["seconds"] is not None and s["seconds"] > 0, s
        assert s["ratio_source"] == "probe" and 0 < s["ratio"] < 2, s
        assert s["memory_source"] == "probe"
    # tracemalloc sees numpy's arrays: a PCA tile task holds at least its decoded float32 block
    assert steps["pca"]["memory"] >= 16 * 16 * tc.BANDS * 4
    assert plan["run"]["seconds"] > 0 and not plan["run"]["seconds_partial"]
    # the probe's fit gives the real outputs: 4 float32 components
    assert not steps["pca"]["outputs_guessed"] and steps["pca"]["bytes_written"] == _grid_pixels(cfg) * (4 * 4 + 1)
    # the estimate against a real run: the stores on disk within a factor of two of the estimate
    assert main(["run", str(cfg), "--plain"]) == 0
    capsys.readouterr()
    run_dir = tmp_path / "run"
    for name in ("mosaic", "pca"):
        measured = sum(p.stat().st_size for p in (run_dir / "stores" / f"{name}.zarr").rglob("*")
                       if p.is_file() and p.name != "zarr.json")
        assert 0.5 * measured <= steps[name]["disk"] <= 2.0 * measured, (name, steps[name]["disk"], measured)
    saved = json.loads((run_dir / "estimate.json").read_text())
    assert [s["step"] for s in saved["steps"]] == ["mosaic", "pca", "feat"]


def test_the_report_shows_the_saved_plan_beside_the_measured_run(tmp_path, capsys):
    import html as h
    import re

    cfg = tc._config(tmp_path, features=FEATURES, report={"enabled": True})
    assert main(["plan", str(cfg), "--probe", "--save"]) == 0
    capsys.readouterr()
    saved = json.loads((tmp_path / "run" / "estimate-plan.json").read_text())
    assert saved["probe"] and saved["run"]["seconds"] > 0
    assert main(["run", str(cfg), "--plain"]) == 0
    capsys.readouterr()
    page = h.unescape((tmp_path / "run" / "report.html").read_text())
    assert "The plan against the run" in page and "estimate-plan.json (probed" in page
    # one row per step: its estimated and measured seconds and store sizes, and their ratios
    for name in ("mosaic", "pca", "feat"):
        row = re.search(rf"<tr><td>{name}</td>(.*?)</tr>", page.split("The plan against the run")[1]).group(1)
        cells = re.findall(r"<td[^>]*>(.*?)</td>", row)
        assert len(cells) == 6 and all(c != "–" for c in cells), (name, cells)
        store = tmp_path / "run" / "stores" / f"{name}.zarr"
        measured = sum(p.stat().st_size for p in store.rglob("*") if p.is_file())
        assert float(cells[4]) == pytest.approx(measured / 1e6, rel=1e-3)


def test_plan_text_names_the_executor_and_the_passes(tmp_path, capsys):
    cfg = tc._config(tmp_path)
    assert main(["plan", str(cfg), "--executor", "dask", "--workers", "3"]) == 0
    out = capsys.readouterr().out
    assert "3 worker(s) x 1 thread(s)" in out and "passes over each store: mosaic 1" in out
    assert "pca" in out and "mosaic" in out


def test_run_refuses_when_the_disk_cannot_hold_it(tmp_path, capsys, monkeypatch):
    cfg = tc._config(tmp_path)
    Usage = namedtuple("Usage", "total used free")
    monkeypatch.setattr(shutil, "disk_usage", lambda p: Usage(10**9, 10**9 - 1000, 1000))
    assert main(["run", str(cfg), "--plain"]) == 2
    err = capsys.readouterr().err
    assert "needs about" in err and "1000 B free" in err, err
    assert not (tmp_path / "run" / "stores").exists()  # refused before writing anything
    # the user may overrule the estimate (it errs on the safe side)
    assert main(["run", str(cfg), "--plain", "--no-disk-check"]) == 0
    capsys.readouterr()
    assert (tmp_path / "run" / "stores" / "pca.zarr").is_dir()


def test_probe_tiles_are_a_systematic_sample_of_the_grid():
    from swathmill.tiles.testing import default_grid

    g = default_grid(100, 130)
    ni, nj = Tiling(g, 16).shape
    assert (ni, nj) == (7, 9)
    # the middle tile of each of 4 equal runs of the 63 tiles in row-major order, worked by hand:
    # floor((k + 0.5) * 63 / 4) = 7, 23, 39, 55 -> (0, 7), (2, 5), (4, 3), (6, 1); the first and the last
    # row of tiles (edges, often part nodata) are both probed
    assert probe_tiles(g, 16, 4) == [(0, 7), (2, 5), (4, 3), (6, 1)]
    assert probe_tiles(default_grid(10, 10), 16, 3) == [(0, 0)]  # one tile: probed once


def _point_fit_steps(points: bool):
    """A source of 4 x 4 tiles and a step whose fit must gather every one of its sample points (as a
    calibration does), with the points spread over the whole grid."""
    from swathmill.tiles.samples import gather, merge_gathered
    from swathmill.tiles.step import Fit, OutputSpec, Step

    rows = np.array([3, 20, 40, 60, 5, 50])
    cols = np.array([60, 5, 33, 12, 2, 61])

    def finalize(acc, params, meta):
        got = 0 if acc is None else acc["idx"].size
        if got != rows.size:
            raise ValueError(f"gathered {got} of {rows.size} samples")
        return {"mean": acc["X"].mean(axis=0)}

    def kernel(block, model):
        return {"d": (block.data["x"] - model["mean"][:, None, None]).astype("float32")}

    fit = Fit(accumulate=lambda b: gather(b, "x", b.static["pts.r"], b.static["pts.c"]), merge=merge_gathered,
              finalize=finalize, points=("pts.r", "pts.c") if points else None)
    spec = OutputSpec(bands=("b0", "b1"), dtype="float32", nodata=float("nan"))
    return Step(name="centred", kernel=kernel, outputs={"d": spec}, inputs={"x": "src/refl"}, fit=fit,
                static={"pts.r": rows, "pts.c": cols}), spec


@pytest.mark.parametrize("points", [True, False])
def test_probe_fits_a_point_sample_fit_on_a_few_tiles(tmp_path, points):
    from swathmill.tiles.plan import probe
    from swathmill.tiles.store import StoreLayout
    from swathmill.tiles.testing import default_grid, write_source_store

    g = default_grid(64, 64)
    step, spec = _point_fit_steps(points)
    x = np.random.default_rng(0).normal(size=(2, 64, 64))
    src = write_source_store(tmp_path / "src.zarr", {"refl": (x, spec)}, g, shard=16)
    res = probe([step], tmp_path / "scratch", tile=16, layout=StoreLayout(16, 16), sources={"src": src},
                n_tiles=2)["centred"]
    assert not (tmp_path / "scratch").exists()
    if points:
        # the points are moved into the 2 probed tiles: the fit finishes and the kernel is timed
        assert res.error is None and res.tile_seconds is not None and res.fit_seconds is not None
        assert "moved into the probed tiles" in res.note
        assert 0 <= res.read_seconds <= res.tile_seconds
    else:
        # without the declaration the fit cannot finish on 2 of 16 tiles: reported, not timed
        assert res.tile_seconds is None and "gathered" in res.error


def test_probe_on_the_runs_workers_times_the_same_steps(tmp_path):
    """Given the run's executor, the probe runs each step's tiles on its workers; same outputs and sizes."""
    from swathmill.tiles.executors import DaskExecutor
    from swathmill.tiles.plan import probe
    from swathmill.tiles.store import StoreLayout
    from swathmill.tiles.testing import default_grid, write_source_store

    g = default_grid(64, 64)
    step, spec = _point_fit_steps(True)
    x = np.random.default_rng(0).normal(size=(2, 64, 64))
    src = write_source_store(tmp_path / "src.zarr", {"refl": (x, spec)}, g, shard=16)
    kw = dict(tile=16, layout=StoreLayout(16, 16), sources={"src": src}, n_tiles=3)
    alone = probe([step], tmp_path / "a", **kw)["centred"]
    ex = DaskExecutor(n_workers=2, processes=False, retries=0)
    try:
        on = probe([step], tmp_path / "b", executor=ex, **kw)["centred"]
    finally:
        ex.close()
    assert on.error is None and on.tile_seconds > 0 and on.fit_seconds > 0
    assert on.ratio == alone.ratio and on.outputs == alone.outputs and on.tiles == alone.tiles == 3


def test_probe_measures_the_products_compression_as_the_export_writes_them(tmp_path):
    """The probe's product ratio (in-memory GeoTIFFs of the probed tiles) against the COG the export
    writes of the same values, full size: within 15 % (the COG adds overviews and headers)."""
    from swathmill.tiles.cog import write_cog
    from swathmill.tiles.plan import probe
    from swathmill.tiles.store import StoreLayout
    from swathmill.tiles.testing import default_grid, write_source_store

    g = default_grid(768, 768)
    step, spec = _point_fit_steps(True)
    rr, cc = np.mgrid[0:768, 0:768]
    noise = np.random.default_rng(1).integers(0, 4, size=(2, 768, 768))
    x = np.stack([np.round(rr / 4.0), np.round(cc / 8.0)]) + noise  # ramps with noise: the predictor pays off
    src = write_source_store(tmp_path / "src.zarr", {"refl": (x, spec)}, g, shard=256)
    pr = probe([step], tmp_path / "scratch", tile=256, layout=StoreLayout(256, 256), sources={"src": src},
               n_tiles=3)["centred"]
    assert pr.product_ratio is not None and 0 < pr.product_ratio < 1
    # the whole product as the export writes it (the kernel shifts each band by a constant: the values
    # are written here shifted by the bands' means)
    full = (x - x.mean(axis=(1, 2), keepdims=True)).astype("float32")
    cog = write_cog(tmp_path / "full.tif", lambda w: full[:, w.row:w.row + w.rows, w.col:w.col + w.cols],
                    g, spec, {})
    measured = cog.stat().st_size / (full.nbytes * 4 / 3)  # per raw byte, overviews counted as the plan does
    # measured here: probe 0.198, COG 0.210; the store's own ratio (zstd, no predictor), 0.154, is not it
    assert pr.product_ratio == pytest.approx(measured, rel=0.15)
