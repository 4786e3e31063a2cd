"""Benchmark of the canopy inversion step: time per tile against the read floor, with a large table.

A float32 cube (``--size`` px square, 99 bands 420-2380 nm, 20 nm FWHM, default 1024 x 1024 px) is
made of ``--canopies`` canopy spectra simulated by the forward model (random parameters), each pixel
one of them plus 1 % noise, written tile by tile (``--tile`` px) as an engine source store in a
temporary folder under ``--dir``. The step ``swathmill.workflows.methods.rtm.step.canopy_step`` with a
table of ``--entries`` entries (default 50,000) runs through the engine on a ``DaskExecutor`` of two
workers, one thread each. Printed as they are measured (every line flushed):

1. the read floor: every tile of the cube read with zarr on the same cluster (best of three);
2. the first run: the fit (the table's simulation, shared among the first ``lut_chunks`` tiles on the
   workers, then the hybrid forest trained on the client; once per run directory) apart from the tile
   phase, with the tiles' progress;
3. ``--repeat`` repetitions of the tile phase alone: the step's store is removed and the run repeated
   in the same run directory, so the engine loads the table from ``models/`` (its fit time is printed:
   a reused table costs well under a second) and the figure is the inversion's alone; per tile seconds
   and the ratio to the read floor, with the load average;
4. one tile in this process (one BLAS thread): the kernel split into the table search and the hybrid
   forest's prediction, and the table search against the float64 formulation it replaced
   (:func:`search_float64`, the full cost matrix ``||x||^2 - 2 x.L + ||L||^2`` in float64 and
   ``argpartition``), with their ratio and the largest difference of their estimates.

Measured figures only. The machine may be shared: the load average is printed beside each figure.

Run: ``.venv/bin/python tests/benchmarks/bench_rtm.py [--entries 50000] [--size 1024] [--repeat 2]``.
"""
from __future__ import annotations

import argparse
import datetime
import os
import platform
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
T0 = time.perf_counter()


def say(text: str) -> None:
    print(f"[{time.perf_counter() - T0:7.1f} s] {text}", flush=True)


class Lines:
    """The engine's progress protocol as plain lines: each finished tile with its elapsed time."""

    def __init__(self) -> None:
        self.state: dict[str, list] = {}

    def start(self, step, total, done, phase="tiles"):
        self.state[step] = [total, done, time.perf_counter(), phase]
        if total:
            say(f"  {step} {phase}: {done} of {total} done before, starting")

    def advance(self, step, n=1):
        st = self.state[step]
        st[1] += n
        say(f"  {step} {st[3]}: {st[1]} of {st[0]} ({time.perf_counter() - st[2]:.1f} s; load {_common.loadavg()})")

    def end(self, step):
        st = self.state.pop(step, None)
        if st and st[0]:
            say(f"  {step} {st[3]}: finished in {time.perf_counter() - st[2]:.1f} s")

    def message(self, text):
        say(f"  {text}")

    def close(self):
        pass


def search_float64(x: np.ndarray, L: np.ndarray, P: np.ndarray, fraction: float) -> tuple[np.ndarray, ...]:
    """The table search as it was before the float32 ranking: the whole float64 cost matrix of a chunk
    of pixels and ``np.argpartition`` on it (kept here only to time against)."""
    x = np.asarray(x, np.float64)
    L = np.asarray(L, np.float64)
    e, b = L.shape
    k = max(1, int(round(fraction * e)))
    chunk = max(16, int(8_000_000 // e))
    l2 = np.einsum("eb,eb->e", L, L)
    est = np.empty((x.shape[0], P.shape[1]))
    spread = np.empty_like(est)
    best = np.empty(x.shape[0])
    for s in range(0, x.shape[0], chunk):
        xs = x[s:s + chunk]
        cost = xs @ L.T
        cost *= -2.0
        cost += l2[None, :]
        cost += np.einsum("pb,pb->p", xs, xs)[:, None]
        np.maximum(cost, 0.0, out=cost)
        sel = P[np.argpartition(cost, k - 1, axis=1)[:, :k]]
        est[s:s + chunk] = sel.mean(axis=1)
        spread[s:s + chunk] = sel.std(axis=1)
        best[s:s + chunk] = np.sqrt(cost.min(axis=1) / b)
    return est, spread, best


def run_once(root: Path, step, src: Path, ex, tile: int) -> tuple[float, dict, bool]:
    from swathmill.tiles.run import Run, RunOptions

    t0 = time.perf_counter()
    with Run(root / "run", RunOptions(tile=tile, chunk=tile, export=False), progress=Lines()) as run:
        res = run.execute([step], ex, sources={"src": src})
    total = time.perf_counter() - t0
    if not res.ok:
        raise SystemExit(f"the canopy run failed: {res.messages}")
    return total, _common.step_timings(root / "run").get(step.name, {}), res.steps[0].total


def one_tile(step, src: Path, model_base: str, tile: int, fraction: float) -> dict:
    """Kernel, table search and forest prediction on tile (0, 0) in this process, one BLAS thread."""
    from threadpoolctl import threadpool_limits

    from swathmill.tiles.store import TileStore
    from swathmill.tiles.tasks import TileTask, load_model, read_block
    from swathmill.workflows.methods.rtm.lut import lut_search, predict_hybrid
    from swathmill.workflows.methods.rtm.step import _hybrid, canopy_kernel

    grid = TileStore(src).grid
    inputs = {alias: (str(src), ref.split("/")[1]) for alias, ref in step.inputs.items()}
    task = TileTask(step, (0, 0), grid, tile, step.halo, inputs)
    out: dict = {}
    with threadpool_limits(1):
        t0 = time.perf_counter()
        block = read_block(task)
        out["read"] = time.perf_counter() - t0
        model = load_model(model_base)
        t0 = time.perf_counter()
        canopy_kernel(block, model)
        out["kernel"] = time.perf_counter() - t0
        bands = np.asarray(model["bands"])
        x = block.data["cube"].reshape(block.data["cube"].shape[0], -1)[bands].T.astype(np.float64)
        x = x[np.isfinite(x).all(axis=1)]
        out["pixels"] = x.shape[0]
        L, Y = model["spectra"], model["targets"]
        t0 = time.perf_counter()
        new = lut_search(x, L, Y, fraction)
        out["search"] = time.perf_counter() - t0
        t0 = time.perf_counter()
        ref = search_float64(x, L, Y, fraction)
        out["search_float64"] = time.perf_counter() - t0
        out["largest_difference"] = [float(np.abs(a - b).max()) for a, b in zip(new, ref)]
        if "hybrid_skops" in model:
            forest = _hybrid(model)
            t0 = time.perf_counter()
            predict_hybrid(forest, x)
            out["hybrid"] = time.perf_counter() - t0
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--entries", type=int, default=50_000)
    ap.add_argument("--size", type=int, default=1024)
    ap.add_argument("--tile", type=int, default=256)
    ap.add_argument("--canopies", type=int, default=200)
    ap.add_argument("--methods", default="lut,hybrid")
    ap.add_argument("--repeat", type=int, default=2, help="repetitions of the tile phase on the kept table")
    ap.add_argument("--dir", default="/tmp")
    a = ap.parse_args()

    from swathmill.tiles.executors import DaskExecutor
    from swathmill.tiles.step import OutputSpec
    from swathmill.tiles.testing import default_grid, write_source_store
    from swathmill.workflows.methods.rtm.forward import Geometry
    from swathmill.workflows.methods.rtm.lut import sample_parameters, simulate_entries
    from swathmill.workflows.methods.rtm.step import CanopyConfig, ParameterRanges, canopy_step

    say(f"{datetime.datetime.now().astimezone():%Y-%m-%d %H:%M %Z}; {platform.node()}, {platform.machine()}, "
        f"{os.cpu_count()} CPUs, Python {platform.python_version()}, numpy {np.__version__}; load {_common.loadavg()}")
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
        step = canopy_step(cfg)
        say(f"cube {a.size} x {a.size} px, {WL.size} bands float32 ({a.canopies} simulated canopies), tiles of "
            f"{a.tile} px; table {a.entries} entries, best {cfg.best_fraction:.0%} averaged; methods {cfg.methods}; "
            f"hybrid {cfg.hybrid.trees} trees on {min(cfg.hybrid.training_size, a.entries)} entries")
        ex = DaskExecutor(n_workers=2, threads_per_worker=1)
        try:
            floors = [_common.read_pass_tiles(src, "cube", a.tile, ex) for _ in range(3)]
            floor = min(floors)
            say(f"read floor {floor:.2f} s (of {', '.join(f'{f:.2f}' for f in floors)}); load {_common.loadavg()}")

            say("first run: the table is simulated and the forest trained (the fit), then the tiles")
            total, ph, tiles = run_once(root, step, src, ex, a.tile)
            fit, tph = ph.get("fit", float("nan")), ph.get("tiles", float("nan"))
            say(f"first run {total:.1f} s: fit (table simulation on the workers + forest on the client) {fit:.1f} s; "
                f"tile phase {tph:.1f} s = {tph / tiles:.2f} s per tile; load {_common.loadavg()}")

            per_tile = []
            for r in range(a.repeat):
                shutil.rmtree(root / "run" / "stores" / f"{cfg.name}.zarr")
                total, ph, tiles = run_once(root, step, src, ex, a.tile)
                fit, tph = ph.get("fit", 0.0), ph.get("tiles", float("nan"))
                per_tile.append(tph / tiles)
                say(f"repetition {r + 1} on the kept table (fit {fit:.2f} s): tile phase {tph:.1f} s for {tiles} tiles "
                    f"= {tph / tiles:.2f} s per tile; read floor {floor:.2f} s ({floor / tiles:.3f} s per tile); "
                    f"ratio {tph / floor:.1f}; load {_common.loadavg()}")
        finally:
            ex.close()

        bd = one_tile(step, src, _common.model_base(root / "run", cfg.name), a.tile, cfg.best_fraction)
        say(f"one tile in this process, one BLAS thread ({bd['pixels']} pixels): read {bd['read']:.2f} s, kernel "
            f"{bd['kernel']:.2f} s; table search {bd['search']:.2f} s"
            + (f", hybrid forest {bd['hybrid']:.2f} s" if "hybrid" in bd else "")
            + f"; load {_common.loadavg()}")
        say(f"table search: float32 ranking with exact settlement {bd['search']:.2f} s, float64 cost matrix "
            f"{bd['search_float64']:.2f} s: speed-up {bd['search_float64'] / bd['search']:.2f}; largest difference of "
            f"estimate, spread, best RMSE {', '.join(f'{d:.1e}' for d in bd['largest_difference'])}")
        if per_tile:
            say(f"summary: {tiles} tiles, table {a.entries} entries; tile phase best {min(per_tile):.2f} s per tile "
                f"(two workers); read floor {floor / tiles:.3f} s per tile; ratio {min(per_tile) * tiles / floor:.1f}")
    finally:
        shutil.rmtree(root, ignore_errors=True)


if __name__ == "__main__":
    main()
