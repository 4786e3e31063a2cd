"""Benchmark of the canopy inversion step: time per tile against the read floor, with a large table.

A float32 cube (``--size`` px square, 99 bands 420-2380 nm, 20 nm FWHM, default 1024 x 1024 px) is
made of ``--canopies`` canopy spectra simulated by the forward model (random parameters), each pixel
one of them plus 1 % noise, written tile by tile (``--tile`` px) as an engine source store in a
temporary folder under ``--dir``. The step ``swathmill.workflows.methods.rtm.step.canopy_step`` with a
table of ``--entries`` entries (default 50,000) runs through the engine on a ``DaskExecutor`` of two
workers. Printed: the fit time (simulating the table and training the forest, once per run
directory), the tile phase time and its time per tile, and the read floor (every tile of the cube
read with zarr on the same cluster), and their ratio. Measured figures only.

Run: ``.venv/bin/python tests/benchmarks/bench_rtm.py [--entries 50000] [--size 1024]``.
"""
from __future__ import annotations

import argparse
import shutil
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).parent))
import _common  # noqa: E402

WL = np.arange(420.0, 2400.0, 20.0)
FWHM = np.full(WL.size, 20.0)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--entries", type=int, default=50_000)
    ap.add_argument("--size", type=int, default=1024)
    ap.add_argument("--tile", type=int, default=256)
    ap.add_argument("--canopies", type=int, default=200)
    ap.add_argument("--methods", default="lut,hybrid")
    ap.add_argument("--dir", default="/tmp")
    a = ap.parse_args()

    from swathmill.tiles.executors import DaskExecutor
    from swathmill.tiles.run import Run, RunOptions
    from swathmill.tiles.step import OutputSpec
    from swathmill.tiles.testing import default_grid, write_source_store
    from swathmill.workflows.methods.rtm.forward import Geometry
    from swathmill.workflows.methods.rtm.lut import sample_parameters, simulate_entries
    from swathmill.workflows.methods.rtm.step import CanopyConfig, ParameterRanges, canopy_step

    root = Path(tempfile.mkdtemp(prefix="bench-rtm-", dir=a.dir))
    try:
        names, table = sample_parameters(ParameterRanges(lai=(0.5, 6.0)).model_dump(), a.canopies, seed=42)
        lib = simulate_entries(names, table, np.arange(a.canopies), Geometry(), WL, FWHM).astype(np.float32)
        rng = np.random.default_rng(1)
        pick = rng.integers(0, a.canopies, (a.size, a.size))
        cube = np.moveaxis(lib[pick], -1, 0)
        cube *= 1.0 + 0.01 * rng.standard_normal(cube.shape, dtype=np.float32)
        spec = OutputSpec(bands=tuple(f"b{i + 1:03d}" for i in range(WL.size)), dtype="float32",
                          nodata=float("nan"), coords={"wavelength": tuple(WL), "fwhm": tuple(FWHM)})
        src = write_source_store(root / "src.zarr", {"cube": (cube, spec)}, default_grid(a.size, a.size),
                                 shard=a.tile)
        del cube
        cfg = CanopyConfig(input="src/cube", lut_size=a.entries, lut_chunks=16, methods=a.methods.split(","))
        ex = DaskExecutor(n_workers=2, threads_per_worker=1)
        try:
            t0 = time.perf_counter()
            with Run(root / "run", RunOptions(tile=a.tile, chunk=a.tile, export=False)) as run:
                res = run.execute([canopy_step(cfg)], ex, sources={"src": src})
            total = time.perf_counter() - t0
            timings = _common.step_timings(root / "run")
            floor = min(_common.read_pass_tiles(src, "cube", a.tile, ex) for _ in range(3))
        finally:
            ex.close()
        tiles = res.steps[0].total
        fit = timings.get("canopy", {}).get("fit", float("nan"))
        tph = timings.get("canopy", {}).get("tiles", float("nan"))
        print(f"load {_common.loadavg()}")
        print(f"cube {a.size} x {a.size} px, {WL.size} bands float32, {tiles} tiles of {a.tile} px; "
              f"table {a.entries} entries; methods {cfg.methods}; ok={res.ok}")
        print(f"fit (table simulation + forest): {fit:.1f} s; run total {total:.1f} s")
        print(f"tile phase {tph:.1f} s = {tph / tiles:.2f} s per tile; read floor {floor:.2f} s "
              f"({floor / tiles:.3f} s per tile); ratio {tph / floor:.1f}")
    finally:
        shutil.rmtree(root, ignore_errors=True)


if __name__ == "__main__":
    main()
