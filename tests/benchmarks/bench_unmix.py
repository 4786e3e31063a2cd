"""Benchmark of fully constrained unmixing: (a) a tile against a loop of scipy.optimize.nnls; (b) the
whole step against the I/O floor.

(a) Solver. Five endmembers, 200 bands (>= 150), synthetic mixtures in which most pixels have
    active constraints (each pixel mixes one to three endmembers, plus noise). Both solvers run in
    this process on the same pixels, BLAS limited to one thread (``--threads`` to change), so the
    ratio compares the algorithms, not the core count. The reference is what the literature does
    pixel by pixel: Heinz and Chang's augmented ``nnls([M; d 1'], [x; d])`` (Heinz and Chang, 2001,
    IEEE TGRS 39(3):529-545). The nnls loop and the tiled solve are interleaved (each repeat times a
    share of the loop, then the whole tile), and the median of the per-repeat ratios is reported, so
    that a change of load on the machine between the two measurements does not bias the figure. It
    prints the throughput of both, the ratios (target >= 30), and the largest abundance difference
    between them on the common pixels.

(b) Step. An int16 cube (default 200 bands x 2048 x 2048 px = 1.68 GB; ``--quick``: 160 x 1024 x 1024
    = 0.34 GB) written tile by tile as an engine source store (output ``refl``, ``wavelength``
    coordinates, ``scale_factor`` 1e-4; tiles = shards of 512 px, inner chunks of 256 px, zstd level
    1) in a temporary folder under ``--dir`` (default /tmp) that is deleted at the end. Every pixel
    is a true mixture of the five endmembers, sum to one, with abundances from smooth random fields
    cut at zero (so most pixels lack one or more endmembers and the non-negativity constraints are
    active), plus white noise. The step ``swathmill.workflows.methods.unmix.unmix_step`` (fully constrained, endmembers
    from a SpectralLibrary of the five spectra at the cube's wavelengths; outputs 5 abundance bands
    and the RMSE band, float32) runs through ``swathmill.tiles.run.Run(...).execute`` on
    ``DaskExecutor(n_workers=2, threads_per_worker=1)``, against the I/O floor measured on the same
    cluster in the same run, right after each step run:

    - one read pass of the cube: the faster of ``dask.array.from_zarr(...).sum()`` (chunks of one
      shard) and a loop of tasks that each read one tile window with zarr;
    - writing an output of the step's size and content: a store with the step's own output arrays
      (abundance 5 bands, rmse 1 band, float32, same layout and codec) and valid mask, every tile
      window written by a task with the content of one real output tile of the run (loaded once per
      worker before the clock starts), so the compressor sees what it sees in the step.

    Before the first repetition each worker imports the unmixing module and loads its compiled
    loops (a one-time cost per process, not timed). Printed per repetition (``--repeat``, default
    5): the step's time (its fit, which only resamples the library, and its tile phase), the floor,
    their ratio (target <= 2.0); the CPU seconds of the cluster's processes in the step and in the
    floor, and their ratio (less disturbed than wall time by other jobs on the machine); and, for
    context, an engine pass-through run (a kernel returning 6 decoded bands as the step's outputs:
    read, decode, encode and write through the engine, no unmixing). Then the accuracy of one
    output tile against the true abundances, and where the time of one interior tile goes (this
    process, one BLAS thread, wall and CPU seconds): zarr read, decoding, kernel (split into the
    ``M'x``/``x'x`` pass, the active-set loop with its optimality check, and the rest), encoding,
    zarr write; with that tile's ratio to its own read + write.

Run::

    .venv/bin/python tests/benchmarks/bench_unmix.py             # both figures, full size
    .venv/bin/python tests/benchmarks/bench_unmix.py --quick     # both, small (256 px tile, 0.34 GB cube)
    .venv/bin/python tests/benchmarks/bench_unmix.py --only solver --rows 256 --ref-pixels 5000
    .venv/bin/python tests/benchmarks/bench_unmix.py --only step --repeat 3 --dir /scratch

Exit status 1 when a figure misses its target (solver ratio < 30, step ratio > 2.0; the step's
figure is the median of the per-repetition ratios). The load average is printed at the start and
the end: other jobs on the machine slow the runs unevenly.
"""
from __future__ import annotations

import argparse
import os
import shutil
import sys
import tempfile
import time
from functools import lru_cache
from pathlib import Path
from typing import Any, Callable

import numpy as np
import scipy.optimize
from threadpoolctl import threadpool_limits

from swathmill.workflows.methods.unmix import Unmixer

HERE = Path(__file__).resolve().parent
SCALE = 1e-4  # stored int16 -> reflectance
NODATA = -9999
NAMES = ("basalt_grit", "dune_sand", "salt_crust", "shrub_canopy", "iron_varnish")  # invented materials


def smooth_spectra(rng: np.random.Generator, bands: int, p: int) -> np.ndarray:
    """p smooth positive spectra (bands, p): sums of a few broad Gaussian features."""
    wl = np.linspace(0.0, 1.0, bands)
    out = np.empty((bands, p))
    for j in range(p):
        s = 0.15 + 0.3 * rng.random() + 0.1 * wl * rng.normal()
        for _ in range(4):
            c, w, h = rng.random(), 0.03 + 0.15 * rng.random(), 0.25 * rng.normal()
            s = s + h * np.exp(-0.5 * ((wl - c) / w) ** 2)
        out[:, j] = np.clip(s, 0.02, 0.95)
    return out


def scene(rng: np.random.Generator, m: np.ndarray, n: int, noise: float) -> tuple[np.ndarray, np.ndarray]:
    """n pixels (bands, n) float32 mixing 1-3 endmembers each with Dirichlet fractions, and the truth."""
    p = m.shape[1]
    a = np.zeros((p, n))
    k = rng.integers(1, 4, size=n)
    for i in range(n):
        idx = rng.choice(p, size=k[i], replace=False)
        a[idx, i] = rng.dirichlet(np.ones(k[i]))
    x = m @ a + rng.normal(0.0, noise, size=(m.shape[0], n))
    return x.astype(np.float32), a


def loadavg() -> str:
    return " ".join(f"{x:.1f}" for x in os.getloadavg())


def gb(nbytes: float) -> str:
    return f"{nbytes / 1e9:.2f} GB"


# (a) one tile against the nnls loop -------------------------------------------------------------------
def solver_figure(args: argparse.Namespace) -> bool:
    """Figure (a); returns whether the median ratio reaches its target."""
    rng = np.random.default_rng(args.seed)
    m = smooth_spectra(rng, args.bands, args.endmembers)
    n = args.rows * args.rows
    x, _truth = scene(rng, m, n, args.noise)
    nref = min(args.ref_pixels, n)
    d = 1e3 * np.abs(m).max()  # Heinz and Chang's weight, 1e3 max|M| (METHODS.md: 10-1000 x max|M|)
    aug = np.vstack([m, np.full((1, m.shape[1]), d)])

    with threadpool_limits(args.threads):
        unmixer = Unmixer(m, "fully_constrained", engine=args.engine)
        unmixer.solve(x[:, :1000])  # warm up (compiles the loop on first use)
        sub = np.ascontiguousarray(x[:, :nref])
        xs = sub.astype(np.float64)
        ref = np.empty((m.shape[1], nref))
        res_sub = unmixer.solve(sub)
        # interleaved: each repeat times a share of the nnls loop, then the whole tile, so that a
        # change of machine load between the two measurements does not bias the ratio
        share = np.array_split(np.arange(nref), args.solver_repeat)
        ratios, t_ref, t_tile = [], 0.0, []
        for rep in range(args.solver_repeat):
            t0 = time.perf_counter()
            for i in share[rep]:
                ref[:, i], _ = scipy.optimize.nnls(aug, np.r_[xs[:, i], d])
            dt_ref = time.perf_counter() - t0
            t_ref += dt_ref
            t0 = time.perf_counter()
            res = unmixer.solve(x)
            t_tile.append(time.perf_counter() - t0)
            ratios.append((dt_ref / share[rep].size) / (t_tile[-1] / n))

    us_ref = t_ref / nref * 1e6
    us_tile = float(np.median(t_tile)) / n * 1e6
    active = float(np.mean(np.any(res.abundances == 0.0, axis=0)))
    print(f"(a) FCLS solver, {args.endmembers} endmembers, {args.bands} bands, BLAS threads {args.threads}, "
          f"engine {unmixer.engine}")
    print(f"  pixels with an active constraint: {active:.1%}; exact fall-backs: {res.n_fallback} of {n}")
    print(f"  scipy.optimize.nnls loop (augmented row): {nref} px in {t_ref:.3f} s = {us_ref:.2f} us/px")
    print(f"  vectorised solver, {args.rows} x {args.rows} tile, median of {args.solver_repeat}: "
          f"{np.median(t_tile):.3f} s = {us_tile:.3f} us/px")
    print(f"  ratio per repeat: {', '.join(f'{r:.1f}' for r in ratios)}")
    diff = np.abs(res_sub.abundances - ref).max()
    print(f"  largest abundance difference to the nnls loop on the common pixels: {diff:.2e} "
          f"(the augmented row enforces the sum only approximately, to O(1/d^2))")
    ratio = float(np.median(ratios))
    print(f"SOLVER RATIO {ratio:.1f} (median; target >= {args.target:g})", flush=True)
    return ratio >= args.target


# (b) the cube -----------------------------------------------------------------------------------------
def endmember_matrix(bands: int, p: int, seed: int) -> np.ndarray:
    """The cube's endmembers (bands, p), reflectance."""
    return smooth_spectra(np.random.default_rng(seed), bands, p)


def wavelengths(bands: int) -> np.ndarray:
    """Band centres evenly spaced over 400-2500 nm."""
    return np.linspace(400.0, 2500.0, bands)


def plane_waves(rows: np.ndarray, cols: np.ndarray, n: int, seed: int, scale: float = 80.0) -> np.ndarray:
    """n smooth fields (n, rows, cols) at global pixel positions: means of 3 random plane waves of
    periods 0.5-3 x ``scale`` px, in [-1, 1]; the same values whatever the tiling."""
    rng = np.random.default_rng(seed)
    out = np.zeros((n, rows.shape[0], cols.shape[1]), dtype=np.float32)
    for i in range(n):
        for _ in range(3):
            theta, period, ph = rng.uniform(0, np.pi), scale * rng.uniform(0.5, 3.0), rng.uniform(0, 2 * np.pi)
            kr = np.float32(np.sin(theta) * 2 * np.pi / period)
            kc = np.float32(np.cos(theta) * 2 * np.pi / period)
            out[i] += np.sin(kr * rows + kc * cols + np.float32(ph))
    return out / np.float32(3.0)


def true_abundances(row: int, col: int, rows: int, cols: int, p: int, seed: int) -> np.ndarray:
    """Abundances (p, rows, cols) float32 of a window: smooth fields cut at zero, summing to one.

    About 40% of the (endmember, pixel) pairs are zero; a pixel where all are zero takes the
    endmember of the largest field alone.
    """
    rr = np.arange(row, row + rows, dtype=np.float32)[:, None]
    cc = np.arange(col, col + cols, dtype=np.float32)[None, :]
    f = plane_waves(rr, cc, p, seed + 1)
    a = np.maximum(f + np.float32(0.1), 0)
    s = a.sum(axis=0)
    none = s <= 0
    if none.any():
        j = np.argmax(f, axis=0)
        for q in range(p):
            a[q][none & (j == q)] = 1.0
        s = a.sum(axis=0)
    a /= s
    return a


def write_cube_tile(task: tuple) -> int:
    """Write one tile of the cube (runs on a worker): ``M a`` plus white noise, int16 in 1e-4 units."""
    from swathmill.tiles.grid import Window
    from swathmill.tiles.store import TileStore

    path, row, col, rows, cols, bands, p, seed, noise = task
    m = endmember_matrix(bands, p, seed).astype(np.float32)
    a = true_abundances(row, col, rows, cols, p, seed)
    cube = np.tensordot(m, a, axes=1)  # (bands, rows, cols) float32 reflectance
    rng = np.random.default_rng([seed, row, col])
    for b in range(bands):  # band by band: no second full-size float array
        cube[b] += np.float32(noise) * rng.standard_normal((rows, cols), dtype=np.float32)
    cube *= np.float32(1.0 / SCALE)
    np.rint(cube, out=cube)
    np.clip(cube, 0, 32767, out=cube)
    store = TileStore(Path(path))
    win = Window(row, col, rows, cols)
    store.write("refl", win, cube.astype(np.int16))
    store.write_valid(win, np.ones((rows, cols), bool))
    return rows * cols


class WorkerCPU:
    """CPU seconds (user + system) of this process's descendants (the cluster's nannies and workers)
    spent inside a ``with`` block: less disturbed by other jobs on the machine than wall time."""

    def __init__(self):
        import psutil

        self._psutil = psutil
        self.seconds = 0.0

    def total(self) -> float:
        tot = 0.0
        for p in self._psutil.Process().children(recursive=True):
            try:
                c = p.cpu_times()
            except self._psutil.Error:
                continue
            tot += c.user + c.system
        return tot

    def __enter__(self) -> "WorkerCPU":
        self._t0 = self.total()
        return self

    def __exit__(self, *exc) -> None:
        self.seconds = self.total() - self._t0


def timed(fn: Callable[[], Any]) -> tuple[Any, float]:
    """(result, worker CPU seconds) of ``fn()``."""
    with WorkerCPU() as cpu:
        res = fn()
    return res, cpu.seconds


def _map(executor, fn: Callable, tasks: list) -> list:
    results: list = []
    errors: list[str] = []
    executor.map(fn, tasks, lambda item, res: results.append(res), lambda item, exc, tb: errors.append(tb))
    if errors:
        raise RuntimeError(errors[0])
    return results


def _windows(rows: int, cols: int, tile: int) -> list[tuple[int, int, int, int]]:
    return [(r, c, min(tile, rows - r), min(tile, cols - c)) for r in range(0, rows, tile) for c in range(0, cols, tile)]


def build_cube(path: Path, size: int, bands: int, p: int, tile: int, executor, seed: int, noise: float) -> float:
    """Create the source store (size x size px) tile by tile on the executor's workers; return seconds."""
    from swathmill.tiles.run import RunOptions
    from swathmill.tiles.step import OutputSpec
    from swathmill.tiles.store import create_store
    from swathmill.tiles.testing import default_grid

    t0 = time.perf_counter()
    spec = OutputSpec(bands=tuple(f"b{i + 1:03d}" for i in range(bands)), dtype="int16", nodata=NODATA,
                      coords={"wavelength": tuple(float(v) for v in wavelengths(bands))},
                      attrs={"scale_factor": SCALE, "units": "1"})
    create_store(path, default_grid(size, size), {"refl": spec}, RunOptions(tile=tile).layout())
    tasks = [(str(path), *w, bands, p, seed, noise) for w in _windows(size, size, tile)]
    _map(executor, write_cube_tile, tasks)
    return time.perf_counter() - t0


def library(bands: int, p: int, seed: int):
    """The cube's endmembers as a SpectralLibrary at the cube's wavelengths."""
    from swathmill.workflows.inputs.library import SpectralLibrary

    return SpectralLibrary(NAMES[:p] if p <= len(NAMES) else tuple(f"em_{i + 1}" for i in range(p)),
                           wavelengths(bands), endmember_matrix(bands, p, seed).T, source="bench-library")


# (b) the step and the floor ---------------------------------------------------------------------------
def warm_worker() -> str:
    """Import the unmixing module and load its compiled loops (runs on each worker, untimed)."""
    from swathmill.workflows.methods.unmix import Unmixer as U

    m = np.eye(6, 3) + 0.1
    U(m, "fully_constrained").solve(np.ones((6, 4)))
    return "ok"


def unmix_run(run_dir: Path, src: Path, executor, tile: int, lib) -> dict:
    """The fully constrained unmixing step through the engine; wall time of ``execute`` and its phases."""
    from swathmill.tiles.run import Run, RunOptions
    from swathmill.workflows.methods.unmix import unmix_step

    step = unmix_step("unmix", "src/refl", method="fully_constrained", library=lib)
    with Run(run_dir, RunOptions(tile=tile, export=False)) as run:
        t0 = time.perf_counter()
        result = run.execute([step], executor, sources={"src": src})
        seconds = time.perf_counter() - t0
    if not result.ok:
        raise RuntimeError(f"the unmixing run failed: {result.steps[-1].failed or result.messages}")
    ph = _timings(run_dir, "unmix")
    return {"seconds": seconds, "fit": ph.get("fit", 0.0), "tiles": ph.get("tiles", 0.0),
            "busy": _busy(run_dir, "unmix")}


def _timings(run_dir: Path, step: str) -> dict[str, float]:
    import sqlite3

    db = sqlite3.connect(f"file:{run_dir / 'ledger.sqlite'}?mode=ro", uri=True)
    try:
        out: dict[str, float] = {}
        for phase, sec in db.execute("SELECT phase, seconds FROM timings WHERE name=?", (step,)):
            out[phase] = out.get(phase, 0.0) + float(sec)
        return out
    finally:
        db.close()


def _busy(run_dir: Path, step: str) -> float:
    """Seconds spent inside the step's tile tasks, summed over tiles (from the ledger)."""
    import sqlite3

    db = sqlite3.connect(f"file:{run_dir / 'ledger.sqlite'}?mode=ro", uri=True)
    try:
        return float(db.execute("SELECT coalesce(sum(seconds), 0) FROM tiles WHERE name=? AND status='done'",
                                (step,)).fetchone()[0])
    finally:
        db.close()


def floor_kernel(block, model) -> dict:
    """Engine pass-through: the first 5 decoded bands as ``abundance``, the 6th as ``rmse``."""
    x = block.data["x"]
    return {"abundance": x[:5], "rmse": x[5:6]}


def _floor_outputs(meta, model, params) -> dict:
    from swathmill.tiles.step import OutputSpec

    return {"abundance": OutputSpec(bands=NAMES, dtype="float32", nodata=float("nan")),
            "rmse": OutputSpec(bands=("rmse",), dtype="float32", nodata=float("nan"))}


def engine_floor_run(run_dir: Path, src: Path, executor, tile: int) -> float:
    from swathmill.tiles.run import Run, RunOptions
    from swathmill.tiles.step import Step

    step = Step(name="passthrough", kernel=floor_kernel, outputs=_floor_outputs, inputs={"x": "src/refl"})
    with Run(run_dir, RunOptions(tile=tile, export=False)) as run:
        t0 = time.perf_counter()
        result = run.execute([step], executor, sources={"src": src})
        seconds = time.perf_counter() - t0
    if not result.ok:
        raise RuntimeError(f"the pass-through run failed: {result.steps[-1].failed or result.messages}")
    return seconds


def read_pass_dask(src: Path, tile: int, client) -> float:
    """Seconds for ``dask.array.from_zarr(...).sum()`` over the cube, chunks of one shard."""
    import dask.array as da
    import zarr

    a = zarr.open_array(str(src / "refl"), mode="r")
    t0 = time.perf_counter()
    x = da.from_zarr(a, chunks=(a.shape[0], tile, tile))
    client.compute(x.sum(dtype="float64")).result()
    return time.perf_counter() - t0


@lru_cache(maxsize=4)
def _zarr_array(path: str):
    import zarr

    return zarr.open_array(path, mode="r")


def read_tile_sum(task: tuple) -> float:
    """Read one tile window of the cube with zarr (runs on a worker); return its sum."""
    path, row, col, rows, cols = task
    return float(_zarr_array(path)[:, row:row + rows, col:col + cols].sum(dtype=np.float64))


def read_pass_tiles(src: Path, size: int, tile: int, executor) -> float:
    """Seconds to read every tile window of the cube with zarr, one task per tile."""
    tasks = [(str(src / "refl"), *w) for w in _windows(size, size, tile)]
    t0 = time.perf_counter()
    _map(executor, read_tile_sum, tasks)
    return time.perf_counter() - t0


@lru_cache(maxsize=2)
def _output_tile(like: str, rows: int, cols: int) -> dict[str, np.ndarray]:
    """The arrays of the output tile at (0, 0) of a finished step store (stored values)."""
    from swathmill.tiles.grid import Window
    from swathmill.tiles.store import TileStore

    s = TileStore(Path(like))
    w = Window(0, 0, rows, cols)
    return {k: s.read(k, w) for k in s.specs}


@lru_cache(maxsize=2)
def _open(path: str, _token: float):
    from swathmill.tiles.store import TileStore

    return TileStore(Path(path))


def write_output_tile(task: tuple) -> int:
    """Write one real output tile's content into a window of the floor store (runs on a worker)."""
    from swathmill.tiles.grid import Window

    out, like, row, col, rows, cols, token, make_only = task
    arrays = _output_tile(like, rows, cols)
    if make_only:
        return 0
    store = _open(out, token)
    win = Window(row, col, rows, cols)
    for k, v in arrays.items():
        store.write(k, win, v)
    store.write_valid(win, np.ones((rows, cols), bool))
    return rows * cols


def write_pass(out: Path, like: Path, tile: int, executor) -> float:
    """Seconds to write every tile of a store shaped like the step store ``like`` (same outputs,
    layout, codec), each tile with the content of ``like``'s tile (0, 0), read before the clock."""
    from swathmill.tiles.store import TileStore, create_store

    ref = TileStore(like)
    grid = ref.grid
    create_store(out, grid, ref.specs, ref.layout)
    token = time.time()
    wins = _windows(grid.rows, grid.cols, tile)
    _map(executor, write_output_tile, [(str(out), str(like), *wins[0], token, True)] * 8)  # load per worker
    tasks = [(str(out), str(like), *w, token, False) for w in wins]
    t0 = time.perf_counter()
    _map(executor, write_output_tile, tasks)
    return time.perf_counter() - t0


# (b) where the time of one tile goes ------------------------------------------------------------------
def tile_breakdown(run_dir: Path, src: Path, tile: int, index: tuple[int, int], scratch: Path,
                   repeat: int = 3) -> dict[str, dict[str, float]]:
    """Wall and CPU seconds of each phase of one tile of the unmixing step, in this process, one BLAS
    thread; the best of ``repeat`` each. The kernel is also timed in parts (see the module notes).
    CPU time counts every thread of this process (zarr decompresses on a thread pool) and is less
    disturbed by other jobs than wall time. Returns ``{"wall": {phase: s}, "cpu": {phase: s}}``."""
    import glob

    from swathmill.tiles.grid import Tiling
    from swathmill.tiles.store import TileStore, create_store, decode, encode
    from swathmill.tiles.tasks import load_model
    from swathmill.workflows.methods.unmix import UnmixSettings, _unmixer

    store = TileStore(src)
    out_store = TileStore(run_dir / "stores" / "unmix.zarr")
    spec = store.specs["refl"]
    t = Tiling(store.grid, tile)[index]
    base = sorted(glob.glob(str(run_dir / "models" / "unmix-*.json")))[0][:-5]
    model = load_model(base)
    u = _unmixer(model, UnmixSettings(method="fully_constrained"))
    scratch_store = create_store(scratch, store.grid, out_store.specs, out_store.layout)
    times: dict[str, float] = {}
    cpu: dict[str, float] = {}

    def clock(name: str, fn: Callable[[], Any]) -> Any:
        best, best_cpu, res = np.inf, np.inf, None
        for _ in range(repeat):
            t0, c0 = time.perf_counter(), time.process_time()
            res = fn()
            best = min(best, time.perf_counter() - t0)
            best_cpu = min(best_cpu, time.process_time() - c0)
        times[name] = best
        cpu[name] = best_cpu
        return res

    with threadpool_limits(1):
        raw = clock("read", lambda: (store.read("refl", t.padded), store.read_valid(t.padded)))[0]
        valid = store.read_valid(t.padded)

        def dec():
            x = decode(raw, spec)
            x[:, ~valid] = np.nan
            return x

        x = clock("decode", dec)
        from swathmill.workflows.methods.unmix import unmix_cube

        res = clock("kernel", lambda: unmix_cube(x, None, unmixer=u))
        # the kernel in parts: the M'x / x'x pass, then the solve on the normal equations
        px = x.reshape(x.shape[0], -1)
        n = px.shape[1]

        def first_pass():
            b = np.empty((u.p, n))
            xx = np.empty(n)
            buf = np.empty((u.bands, min(u.chunk, n)))
            for lo in range(0, n, u.chunk):
                hi = min(lo + u.chunk, n)
                xc = buf[:, : hi - lo]
                xc[...] = px[:, lo:hi]
                np.matmul(u._mt, xc, out=b[:, lo:hi])
                np.einsum("ij,ij->j", xc, xc, out=xx[lo:hi])
            return b, xx

        b, xx = clock("kernel_pass", first_pass)
        clock("kernel_solve", lambda: u._solve_normal(b, xx))
        enc = clock("encode", lambda: {k: encode(np.asarray(res[k]), out_store.specs[k], valid) for k in out_store.specs})

        def write():
            scratch_store.clear(t.core)
            for k, arr in enc.items():
                scratch_store.write(k, t.core, arr)
            scratch_store.write_valid(t.core, valid)

        clock("write", write)
    for d in (times, cpu):
        d["kernel_rest"] = max(0.0, d["kernel"] - d["kernel_pass"] - d["kernel_solve"])
    return {"wall": times, "cpu": cpu}


def accuracy(run_dir: Path, tile: int, p: int, seed: int) -> dict[str, float]:
    """Output tile (0, 0) against the true abundances: share of pixels with a zero abundance, RMSE."""
    from swathmill.tiles.grid import Window
    from swathmill.tiles.store import TileStore, decode

    s = TileStore(run_dir / "stores" / "unmix.zarr")
    w = Window(0, 0, tile, tile)
    est = decode(s.read("abundance", w), s.specs["abundance"])
    truth = true_abundances(0, 0, tile, tile, p, seed)
    return {"active": float(np.mean(np.any(est == 0.0, axis=0))),
            "truth_zero": float(np.mean(np.any(truth == 0.0, axis=0))),
            "rmse": float(np.sqrt(np.mean((est - truth) ** 2))),
            "sum_err": float(np.abs(est.sum(axis=0) - 1).max()),
            "min": float(est.min())}


def step_figure(args: argparse.Namespace) -> bool:
    """Figure (b); returns whether the median ratio meets its target."""
    import dask
    import zarr

    from swathmill.tiles.executors import DaskExecutor
    from swathmill.workflows.methods.unmix import condition_number

    size, bands, tile, p = args.size, args.cube_bands, args.tile, args.endmembers
    if size % tile:
        raise SystemExit(f"--size must be a multiple of --tile. Got {size} and {tile}")
    nbytes = bands * size * size * 2
    out_bytes = (p + 1) * size * size * 4
    m = endmember_matrix(bands, p, args.seed)
    print(f"(b) cube: int16 {bands} bands x {size} x {size} px = {gb(nbytes)}, tiles (= shards) of {tile} px "
          f"({(size // tile) ** 2} tiles), zstd level 1; {p} endmembers (condition number of the fully "
          f"constrained problem {condition_number(m, 'fully_constrained'):.1f}), noise {args.noise} reflectance; "
          f"output {p} + 1 float32 bands = {gb(out_bytes)}; {args.workers} Dask worker processes x 1 thread; "
          f"{os.cpu_count()} CPUs; zarr {zarr.__version__}, dask {dask.__version__}", flush=True)
    print(f"    load average before (b): {loadavg()}", flush=True)
    tmp = Path(tempfile.mkdtemp(prefix="bench-unmix-", dir=args.dir))
    src = tmp / "cube.zarr"
    lib = library(bands, p, args.seed)
    ratios, engine_ratios, cpu_ratios, runs, floors = [], [], [], [], []
    try:
        ex = DaskExecutor(n_workers=args.workers, threads_per_worker=1)
        try:
            t = build_cube(src, size, bands, p, tile, ex, args.seed, args.noise)
            disk = sum(f.stat().st_size for f in src.rglob("*") if f.is_file())
            print(f"    built the cube in {t:.1f} s ({gb(disk)} on disk)", flush=True)
            ex.client.run(warm_worker)  # imports and compiled loops: once per worker, not timed
            for k in range(args.repeat):
                run_dir = tmp / f"run-{k}"
                r, c_step = timed(lambda: unmix_run(run_dir, src, ex, tile, lib))
                rd, c_rd = timed(lambda: read_pass_dask(src, tile, ex.client))
                rt, c_rt = timed(lambda: read_pass_tiles(src, size, tile, ex))
                w, c_w = timed(lambda: write_pass(tmp / "floor.zarr", run_dir / "stores" / "unmix.zarr", tile, ex))
                shutil.rmtree(tmp / "floor.zarr")
                te, c_te = timed(lambda: engine_floor_run(tmp / f"pass-{k}", src, ex, tile))
                shutil.rmtree(tmp / f"pass-{k}")
                floor = min(rd, rt) + w
                c_floor = (c_rd if rd <= rt else c_rt) + c_w
                ratios.append(r["seconds"] / floor)
                engine_ratios.append(r["seconds"] / te)
                cpu_ratios.append(c_step / c_floor)
                runs.append(r)
                floors.append((rd, rt, w, te))
                print(f"  repetition {k + 1} (load {loadavg()}): unmixing step {r['seconds']:.2f} s (fit "
                      f"{r['fit']:.2f} + tiles {r['tiles']:.2f}; inside tile tasks {r['busy']:.1f} s over "
                      f"{args.workers} workers); floor {floor:.2f} s = read {min(rd, rt):.2f} (from_zarr {rd:.2f}, "
                      f"tile loop {rt:.2f}) + write {w:.2f}: RATIO {ratios[-1]:.2f}; engine pass-through "
                      f"{te:.2f} s (step / pass-through {engine_ratios[-1]:.2f})", flush=True)
                print(f"      worker CPU s: step {c_step:.2f}, floor {c_floor:.2f} (read from_zarr {c_rd:.2f}, tile loop "
                      f"{c_rt:.2f}, write {c_w:.2f}), pass-through {c_te:.2f}; CPU ratio step / floor "
                      f"{cpu_ratios[-1]:.2f}", flush=True)
                if k < args.repeat - 1:
                    shutil.rmtree(run_dir)
        finally:
            ex.close()
        last = tmp / f"run-{args.repeat - 1}"
        acc = accuracy(last, tile, p, args.seed)
        print(f"    output tile (0, 0) against the truth: pixels with a zero abundance {acc['active']:.1%} (true "
              f"mixtures lacking an endmember {acc['truth_zero']:.1%}); abundance RMSE {acc['rmse']:.4f}; "
              f"largest |sum - 1| {acc['sum_err']:.1e}; smallest abundance {acc['min']:.1e}", flush=True)
        n = size // tile
        index = (1, 1) if n > 2 else (0, 0)
        bd = tile_breakdown(last, src, tile, index, tmp / "scratch.zarr")
        for kind in ("wall", "cpu"):
            t = bd[kind]
            total = sum(t[k] for k in ("read", "decode", "kernel", "encode", "write"))
            print(f"    one tile {index} in this process, one BLAS thread, best of 3, {kind} s: read {t['read']:.3f} + "
                  f"decode {t['decode']:.3f} + kernel {t['kernel']:.3f} (M'x and x'x pass {t['kernel_pass']:.3f}, "
                  f"active set and optimality check {t['kernel_solve']:.3f}, rest {t['kernel_rest']:.3f}) + encode "
                  f"{t['encode']:.3f} + write {t['write']:.3f} = {total:.3f} s; against read + write: "
                  f"{total / (t['read'] + t['write']):.2f}", flush=True)
        best = min(range(len(runs)), key=lambda i: runs[i]["seconds"])
        rd, rt, w, te = (min(f[i] for f in floors) for i in range(4))
        print(f"    best figures: step {runs[best]['seconds']:.2f} s ({nbytes / runs[best]['seconds'] / 1e9:.2f} GB/s "
              f"of cube); read pass {min(rd, rt):.2f} s ({nbytes / min(rd, rt) / 1e9:.2f} GB/s); write of the "
              f"output {w:.2f} s; engine pass-through {te:.2f} s; best step / best floor = "
              f"{runs[best]['seconds'] / (min(rd, rt) + w):.2f}", flush=True)
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    ratio = float(np.median(ratios))
    print(f"STEP RATIO {ratio:.2f} (median of {', '.join(f'{x:.2f}' for x in ratios)}; target <= {args.step_target:g}); "
          f"step / engine pass-through: median {float(np.median(engine_ratios)):.2f}; worker CPU time step / floor: "
          f"median {float(np.median(cpu_ratios)):.2f}", flush=True)
    return ratio <= args.step_target


# main -------------------------------------------------------------------------------------------------
def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true",
                    help="(a) 256 px tile, 5,000 nnls pixels; (b) 160 bands x 1024 x 1024 px (0.34 GB)")
    ap.add_argument("--only", choices=("both", "solver", "step"), default="both")
    ap.add_argument("--endmembers", type=int, default=5)
    ap.add_argument("--noise", type=float, default=0.005, help="noise standard deviation (reflectance)")
    ap.add_argument("--seed", type=int, default=2026)
    g = ap.add_argument_group("(a) solver")
    g.add_argument("--rows", type=int, default=512, help="tile rows = cols (default 512)")
    g.add_argument("--bands", type=int, default=200)
    g.add_argument("--ref-pixels", type=int, default=20000, help="pixels solved by the nnls loop")
    g.add_argument("--threads", type=int, default=1, help="BLAS threads for both solvers")
    g.add_argument("--solver-repeat", type=int, default=7,
                   help="interleaved repeats (the median ratio is reported)")
    g.add_argument("--target", type=float, default=30.0)
    g.add_argument("--engine", choices=["auto", "numpy", "compiled"], default="auto",
                   help="active-set engine of the solver (auto: compiled when numba is installed)")
    g = ap.add_argument_group("(b) step")
    g.add_argument("--cube-bands", type=int, default=200)
    g.add_argument("--size", type=int, default=2048, help="cube rows = cols (px)")
    g.add_argument("--tile", type=int, default=512)
    g.add_argument("--workers", type=int, default=2)
    g.add_argument("--repeat", type=int, default=5, help="repetitions of (step run, floor)")
    g.add_argument("--step-target", type=float, default=2.0)
    g.add_argument("--dir", type=Path, default=Path("/tmp"), help="parent of the temporary folder")
    args = ap.parse_args(argv)
    if args.quick:
        args.rows, args.ref_pixels = 256, 5000
        args.cube_bands, args.size = 160, 1024
    print(f"load average at start: {loadavg()}", flush=True)
    ok = True
    if args.only in ("both", "solver"):
        ok &= solver_figure(args)
    if args.only in ("both", "step"):
        ok &= step_figure(args)
    print(f"load average at end: {loadavg()}", flush=True)
    return 0 if ok else 1


if __name__ == "__main__":
    # import the module by name so that the Dask workers unpickle its task functions
    sys.path.insert(0, str(HERE))
    import bench_unmix

    sys.exit(bench_unmix.main())
