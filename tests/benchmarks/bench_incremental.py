"""Benchmark: a growing campaign, adding one line to eight, against a full run, side by side in one run.

Builds nine flight lines (GeoTIFF, int16) from one smooth invented scene in a temporary folder: eight
strips across the mosaic and a ninth whose footprint covers about 1/8 of it, over the others. Then
measures, with the steps mosaic (brightness matching), a 3 x 3 mean filter and MNF:

- full:         a fresh run over all nine lines (models fitted);
- fresh-kept:   a fresh run over all nine lines with the kept models of the incremental run (no fit);
- incremental:  the ninth line added to a run that has processed the eight (frozen mode);
- refit full:   a fresh run over all nine lines in refit mode (models fitted, accumulator results kept);
- refit:        the ninth line added in refit mode to a run that has processed the eight (every model
                fitted again exactly from kept per-tile accumulator results).

Prints the measured seconds and the ratios incremental / full, incremental / fresh-kept and refit /
refit full, and checks that the incremental products equal the fresh-kept ones byte for byte and the
refit products the refit full ones (``--no-refit`` leaves the refit runs out)::

    python tests/benchmarks/bench_incremental.py [--rows 512] [--cols 1024] [--bands 24] [--tile 64] [--export]
    python tests/benchmarks/bench_incremental.py --rows 128 --cols 256 --bands 8 --tile 32   # a quick check
"""
from __future__ import annotations

import argparse
import json
import shutil
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import rasterio
from affine import Affine

from swathmill.tiles.executors import LocalExecutor
from swathmill.tiles.incremental import campaign_history, frozen_model_dir
from swathmill.tiles.ops import mean_filter_step
from swathmill.tiles.run import Run, RunOptions
from swathmill.tiles.store import open_store
from swathmill.workflows.methods.mnf import MnfConfig, mnf_steps
from swathmill.workflows.methods.mosaic import MosaicConfig, build_mosaic_step

CRS = "EPSG:32612"


def make_lines(folder: Path, rows: int, cols: int, bands: int, seed: int = 5) -> list[Path]:
    from scipy import ndimage

    rng = np.random.default_rng(seed)
    truth = np.stack([ndimage.gaussian_filter(rng.uniform(0, 1, (rows, cols)), 6) for _ in range(bands)])
    truth = 0.08 + 0.5 * (truth - truth.min()) / (truth.max() - truth.min())
    t0 = Affine(5.0, 0, 500000, 0, -5.0, 4000000)
    wl = np.linspace(450, 2300, bands)
    strip = cols // 8
    boxes = [(0, rows, max(0, k * strip - 8), min(cols, (k + 1) * strip + 8)) for k in range(8)]
    # the ninth line: about 1/8 of the mosaic's area, in its middle, over four of the strips
    h9 = rows // 2
    w9 = cols // 4
    boxes.append((rows // 4, rows // 4 + h9, cols // 2 - w9 // 2, cols // 2 + w9 // 2))
    paths = []
    for k, (r0, r1, c0, c1) in enumerate(boxes):
        g = 1.0 + 0.03 * ((k % 3) - 1)
        obs = truth[:, r0:r1, c0:c1] * g + 0.002 * k + rng.normal(0, 0.002, (bands, r1 - r0, c1 - c0))
        p = folder / f"line{k + 1:02d}.tif"
        with rasterio.open(p, "w", driver="GTiff", width=c1 - c0, height=r1 - r0, count=bands, dtype="int16",
                           crs=CRS, transform=t0 @ Affine.translation(c0, r0), nodata=-9999,
                           tiled=True, blockxsize=256, blockysize=256) as ds:
            ds.write(np.rint(obs * 1e4).astype(np.int16))
            for b in range(bands):
                ds.update_tags(b + 1, wavelength=repr(float(wl[b])))
        paths.append(p)
    return paths


def steps(lines: list[Path], tile: int) -> list:
    mosaic = build_mosaic_step(MosaicConfig(lines=[str(p) for p in lines], anchor=tile, sample_size=4000))
    return [mosaic, mean_filter_step("smooth", "mosaic/reflectance", 3),
            *mnf_steps(MnfConfig(components=8), "mosaic/reflectance")]


def run(run_dir: Path, lines: list[Path], tile: int, export: bool, mode: str = "frozen") -> tuple[float, dict]:
    t0 = time.perf_counter()
    with Run(run_dir, RunOptions(tile=tile, export=export, incremental=mode)) as r:
        res = r.execute(steps(lines, tile), LocalExecutor())
    dt = time.perf_counter() - t0
    if not res.ok:
        raise SystemExit(f"run {run_dir} did not finish: {res.messages}")
    return dt, {s.name: {"computed": s.computed, "total": s.total, "fit": s.fit} for s in res.steps}


def same_stores(a: Path, b: Path) -> bool:
    for step in ("mosaic", "smooth", "mnf"):
        sa, sb = open_store(a / "stores" / f"{step}.zarr"), open_store(b / "stores" / f"{step}.zarr")
        if sa.grid != sb.grid:
            return False
        for name in [*sa.specs]:
            if sa.read(name, sa.grid.full).tobytes() != sb.read(name, sb.grid.full).tobytes():
                return False
    return True


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    p.add_argument("--rows", type=int, default=512)
    p.add_argument("--cols", type=int, default=1024)
    p.add_argument("--bands", type=int, default=24)
    p.add_argument("--tile", type=int, default=64)
    p.add_argument("--export", action="store_true", help="also write COG products (whole files, every invocation)")
    p.add_argument("--no-refit", action="store_true", help="leave out the refit-mode runs")
    a = p.parse_args(argv)
    tmp = Path(tempfile.mkdtemp(prefix="bench-incremental-"))
    try:
        lines = make_lines(tmp, a.rows, a.cols, a.bands)
        t_full, full = run(tmp / "full", lines, a.tile, a.export)
        t_eight, _ = run(tmp / "growing", lines[:8], a.tile, a.export)
        t_inc, inc = run(tmp / "growing", lines, a.tile, a.export)
        shutil.copytree(frozen_model_dir(tmp / "growing"), frozen_model_dir(tmp / "kept"))
        t_kept, _ = run(tmp / "kept", lines, a.tile, a.export)
        equal = same_stores(tmp / "growing", tmp / "kept")
        refit = {}
        if not a.no_refit:
            t_rfull, _ = run(tmp / "refit-full", lines, a.tile, a.export, "refit")
            t_reight, _ = run(tmp / "refit-growing", lines[:8], a.tile, a.export, "refit")
            t_rinc, rinc = run(tmp / "refit-growing", lines, a.tile, a.export, "refit")
            requal = same_stores(tmp / "refit-growing", tmp / "refit-full")
            equal = equal and requal
            refit = {"refit_seconds": {"full": round(t_rfull, 3), "eight_lines": round(t_reight, 3),
                                       "add_ninth_line": round(t_rinc, 3)},
                     "ratio_refit_to_refit_full": round(t_rinc / t_rfull, 4),
                     "ratio_refit_to_full": round(t_rinc / t_full, 4),
                     "refit_tiles": rinc, "refit_fits": campaign_history(tmp / "refit-growing")[-1]["fits"],
                     "refit_equals_refit_full": requal}
        print(json.dumps({
            "mosaic_px": [a.rows, a.cols], "bands": a.bands, "tile": a.tile, "export": a.export,
            "seconds": {"full": round(t_full, 3), "fresh_kept_models": round(t_kept, 3),
                        "eight_lines": round(t_eight, 3), "add_ninth_line": round(t_inc, 3)},
            "ratio_incremental_to_full": round(t_inc / t_full, 4),
            "ratio_incremental_to_fresh_kept_models": round(t_inc / t_kept, 4),
            "incremental_tiles": inc, "full_tiles": full,
            "incremental_equals_fresh_with_kept_models": same_stores(tmp / "growing", tmp / "kept"), **refit,
        }, indent=1))
        return 0 if equal else 1
    finally:
        shutil.rmtree(tmp, ignore_errors=True)


if __name__ == "__main__":
    sys.exit(main())
