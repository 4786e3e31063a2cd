"""Shared pieces of the MNF and classification benchmarks: synthetic cubes, I/O floors, memory, timing.

Not collected by pytest (no ``test_`` prefix). The scripts that use it put this folder on
``sys.path`` and import it as ``_common``, so its task functions pickle by reference and the Dask
worker processes (started by spawn, which passes ``sys.path`` on) import the same module.

The cube
    An engine source store (one output ``refl``: int16, ``bands`` bands named b001.., coords
    ``wavelength``/``fwhm`` in nm, attrs ``scale_factor = 1e-4`` so decoding gives reflectance),
    written tile by tile on the executor's workers, so memory stays at one tile per worker. Each
    pixel mixes ``n_endmembers`` smooth spectra with abundances that vary smoothly in space (sums
    of sinusoids of the global row and column, the same whatever the tiling), times a smooth
    illumination factor, plus white noise whose standard deviation grows towards both ends of the
    spectrum (as a detector's does): a signal that lives in a few dimensions and is spatially
    smooth, noise that is not, which is what the MNF transform separates.

I/O floors
    :func:`read_pass_dask` (``dask.array.from_zarr(...).sum()``, one task per shard) and
    :func:`read_pass_tiles` (one task per tile reading the shard with zarr and summing it), both on
    the caller's cluster; :func:`write_pass` writes a float32 array of a given band count with the
    engine's layout and codec, from a random block made once per worker (its generation is not timed).
"""
from __future__ import annotations

import json
import os
import sqlite3
import threading
import time
from functools import lru_cache
from pathlib import Path
from typing import Any, Callable

import numpy as np

__all__ = [
    "loadavg",
    "gb",
    "wavelengths",
    "smooth_spectra",
    "smooth_fields",
    "build_cube",
    "set_worker_env",
    "write_cube_tile",
    "read_pass_dask",
    "read_pass_tiles",
    "write_pass",
    "PeakRSS",
    "CpuMeter",
    "cpu_snapshot",
    "step_timings",
    "best_of",
    "tile_seconds",
    "model_base",
    "tile_breakdown",
    "format_breakdown",
]

SCALE = 1e-4  # stored int16 -> reflectance
NODATA = -9999


def loadavg() -> str:
    """The 1, 5 and 15 minute load averages, formatted."""
    return " ".join(f"{x:.1f}" for x in os.getloadavg())


def gb(nbytes: float) -> str:
    return f"{nbytes / 1e9:.2f} GB"


def wavelengths(bands: int) -> tuple[np.ndarray, np.ndarray]:
    """Band centres evenly spaced over 400-2500 nm and a FWHM of 1.1 band spacings (nm)."""
    wl = np.linspace(400.0, 2500.0, bands)
    step = wl[1] - wl[0] if bands > 1 else 10.0
    return wl, np.full(bands, 1.1 * step)


def smooth_spectra(bands: int, k: int, seed: int) -> np.ndarray:
    """k smooth reflectance spectra (k, bands) in [0.02, 0.85]: broad Gaussian features on a slope."""
    rng = np.random.default_rng(seed)
    x = np.linspace(0.0, 1.0, bands)
    out = np.empty((k, bands))
    for j in range(k):
        s = 0.15 + 0.35 * rng.random() + 0.15 * x * rng.normal()
        for _ in range(5):
            c, w, h = rng.random(), 0.02 + 0.12 * rng.random(), 0.2 * rng.normal()
            s = s + h * np.exp(-0.5 * ((x - c) / w) ** 2)
        out[j] = np.clip(s, 0.02, 0.85)
    return out


def smooth_fields(rows: np.ndarray, cols: np.ndarray, n: int, seed: int, terms: int = 3,
                  scale: float = 60.0) -> np.ndarray:
    """n smooth fields (n, *shape) at global pixel positions (``rows`` and ``cols`` broadcast
    to ``shape``): means of ``terms`` random plane waves of periods 0.5-3 x ``scale`` px, in [-1, 1]."""
    rng = np.random.default_rng(seed)
    rows = np.asarray(rows, dtype=np.float32)
    cols = np.asarray(cols, dtype=np.float32)
    out = np.zeros((n, *np.broadcast_shapes(rows.shape, cols.shape)), dtype=np.float32)
    for i in range(n):
        for _ in range(terms):
            theta = rng.uniform(0, np.pi)
            period = scale * rng.uniform(0.5, 3.0)
            ph = rng.uniform(0, 2 * np.pi)
            kr, kc = np.float32(np.sin(theta) * 2 * np.pi / period), np.float32(np.cos(theta) * 2 * np.pi / period)
            out[i] += np.sin(kr * rows + kc * cols + np.float32(ph))
    return out / np.float32(terms)


def noise_sigma(bands: int) -> np.ndarray:
    """Noise standard deviation per band in reflectance: 0.002 in the middle, 0.008 at the ends."""
    x = np.linspace(-1.0, 1.0, bands)
    return 0.002 + 0.006 * x ** 4


def write_cube_tile(task: tuple) -> int:
    """Write one tile of the synthetic cube (runs on a worker); returns its pixel count."""
    from swathmill.tiles.grid import Window
    from swathmill.tiles.store import TileStore

    path, row, col, rows, cols, bands, k, seed = task
    store = TileStore(Path(path))
    em = smooth_spectra(bands, k, seed).astype(np.float32)  # (k, bands)
    rr = np.arange(row, row + rows, dtype=np.float32)[:, None]
    cc = np.arange(col, col + cols, dtype=np.float32)[None, :]
    ab = np.exp(2.0 * smooth_fields(rr, cc, k, seed + 1))  # positive, smooth
    ab /= ab.sum(axis=0)
    light = 1.0 + 0.15 * smooth_fields(rr, cc, 1, seed + 2, scale=200.0)[0]
    cube = np.tensordot(em.T, ab * light, axes=1)  # (bands, rows, cols) float32 reflectance
    rng = np.random.default_rng([seed, row, col])
    sig = noise_sigma(bands).astype(np.float32)
    for b in range(bands):  # band by band: no second full-size float array
        cube[b] += sig[b] * rng.standard_normal((rows, cols), dtype=np.float32)
    cube *= np.float32(1.0 / SCALE)
    np.rint(cube, out=cube)
    np.clip(cube, 0, 32767, out=cube)
    win = Window(row, col, rows, cols)
    store.write("refl", win, cube.astype(np.int16))
    store.write_valid(win, np.ones((rows, cols), bool))
    return rows * cols


def cube_spec(bands: int):
    from swathmill.tiles.step import OutputSpec

    wl, fwhm = wavelengths(bands)
    return OutputSpec(bands=tuple(f"b{i + 1:03d}" for i in range(bands)), dtype="int16", nodata=NODATA,
                      coords={"wavelength": tuple(float(v) for v in wl), "fwhm": tuple(float(v) for v in fwhm)},
                      attrs={"scale_factor": SCALE, "units": "1"})


def _map(executor, fn: Callable, tasks: list) -> list:
    results: list = []
    errors: list[str] = []
    executor.map(fn, tasks, lambda item, res: results.append(res), lambda item, exc, tb: errors.append(tb))
    if errors:
        raise RuntimeError(errors[0])
    return results


def build_cube(path: Path, size: int, bands: int, tile: int, executor, *, n_endmembers: int = 6,
               seed: int = 11) -> dict[str, Any]:
    """Create the cube store at ``path`` (size x size px); returns its facts and build time."""
    from swathmill.tiles.grid import Tiling
    from swathmill.tiles.run import RunOptions
    from swathmill.tiles.store import create_store
    from swathmill.tiles.testing import default_grid

    t0 = time.perf_counter()
    grid = default_grid(size, size)
    create_store(path, grid, {"refl": cube_spec(bands)}, RunOptions(tile=tile).layout())
    tasks = [(str(path), t.core.row, t.core.col, t.core.rows, t.core.cols, bands, n_endmembers, seed)
             for t in Tiling(grid, tile)]
    _map(executor, write_cube_tile, tasks)
    return {"seconds": time.perf_counter() - t0, "nbytes": bands * size * size * 2, "tiles": len(tasks),
            "endmembers": smooth_spectra(bands, n_endmembers, seed), "disk": _du(path)}


def _du(path: Path) -> int:
    return sum(f.stat().st_size for f in Path(path).rglob("*") if f.is_file())


WORKER_ENV: dict[str, str] | None = None  # set by set_worker_env; passed to DaskExecutor(worker_env=...)


def set_worker_env(pairs: list[str]) -> dict[str, str]:
    """The allocator settings the engine gives its workers, with ``KEY=VALUE`` pairs added or replaced.

    Returns the environment that the benchmark passes to ``DaskExecutor(worker_env=...)`` (also kept in
    :data:`WORKER_ENV`). ``KEY=`` drops a key: ``MALLOC_MMAP_THRESHOLD_= MALLOC_TRIM_THRESHOLD_=65536``
    gives Dask's own default, to compare with the engine's :data:`swathmill.tiles.executors.WORKER_MALLOC_ENV`.
    """
    global WORKER_ENV
    from swathmill.tiles.executors import WORKER_MALLOC_ENV

    env = dict(WORKER_MALLOC_ENV)
    for pair in pairs:
        key, sep, value = pair.partition("=")
        if not sep or not key:
            raise ValueError(f"--worker-env takes KEY=VALUE. Got {pair!r}")
        if value:
            env[key] = value
        else:
            env.pop(key, None)  # KEY= drops the engine's setting
    WORKER_ENV = env
    return env


# I/O floors ---------------------------------------------------------------------------------------
def read_pass_dask(src: Path, output: str, tile: int, client) -> float:
    """Seconds for ``dask.array.from_zarr(...).sum()`` over one output, chunks of one shard."""
    import dask.array as da
    import zarr

    a = zarr.open_array(str(Path(src) / output), mode="r")
    t0 = time.perf_counter()
    x = da.from_zarr(a, chunks=(a.shape[0], tile, tile))
    client.compute(x.sum(dtype="float64")).result()
    return time.perf_counter() - t0


def read_tile_sum(task: tuple) -> float:
    """Read one tile window of an output with zarr (runs on a worker); return its sum."""
    path, output, row, col, rows, cols = task
    a = _zarr_array(path, output)
    return float(a[:, row:row + rows, col:col + cols].sum(dtype=np.float64))


@lru_cache(maxsize=8)
def _zarr_array(path: str, output: str):
    import zarr

    return zarr.open_array(str(Path(path) / output), mode="r")


def _windows(size_rows: int, size_cols: int, tile: int) -> list[tuple[int, int, int, int]]:
    return [(r, c, min(tile, size_rows - r), min(tile, size_cols - c))
            for r in range(0, size_rows, tile) for c in range(0, size_cols, tile)]


def read_pass_tiles(src: Path, output: str, tile: int, executor) -> float:
    """Seconds to read every tile of one output with zarr on the executor's workers."""
    import zarr

    a = zarr.open_array(str(Path(src) / output), mode="r")
    tasks = [(str(src), output, *w) for w in _windows(a.shape[1], a.shape[2], tile)]
    t0 = time.perf_counter()
    _map(executor, read_tile_sum, tasks)
    return time.perf_counter() - t0


@lru_cache(maxsize=2)
def _random_block(bands: int, rows: int, cols: int) -> np.ndarray:
    return np.random.default_rng(3).standard_normal((bands, rows, cols), dtype=np.float32)


def write_tile_block(task: tuple) -> int:
    """Write a random float32 block into one tile window of ``out`` (runs on a worker)."""
    from swathmill.tiles.grid import Window
    from swathmill.tiles.store import TileStore

    path, row, col, rows, cols, bands, make_only = task
    block = _random_block(bands, rows, cols)
    if make_only:
        return 0
    store = TileStore(Path(path))
    win = Window(row, col, rows, cols)
    store.write("out", win, block)
    store.write_valid(win, np.ones((rows, cols), bool))
    return rows * cols


def write_pass(out: Path, grid, bands: int, tile: int, executor) -> float:
    """Seconds to write a float32 (bands, rows, cols) store with the engine's layout and codec.

    The data are standard normal values (as incompressible as transform components); a block is
    made once per worker before the clock starts.
    """
    from swathmill.tiles.run import RunOptions
    from swathmill.tiles.step import OutputSpec
    from swathmill.tiles.store import create_store

    spec = OutputSpec(bands=tuple(f"c{i + 1}" for i in range(bands)), dtype="float32", nodata=float("nan"))
    create_store(out, grid, {"out": spec}, RunOptions(tile=tile).layout())
    wins = _windows(grid.rows, grid.cols, tile)
    _map(executor, write_tile_block, [(str(out), *wins[0], bands, True)] * 8)  # warm the blocks
    tasks = [(str(out), *w, bands, False) for w in wins]
    t0 = time.perf_counter()
    _map(executor, write_tile_block, tasks)
    return time.perf_counter() - t0


# memory and CPU time ------------------------------------------------------------------------------
def cpu_snapshot() -> dict[int, float]:
    """User + system CPU seconds of this process and each of its descendants, by pid."""
    import psutil

    me = psutil.Process()
    out = {}
    for p in [me, *me.children(recursive=True)]:
        try:
            t = p.cpu_times()
        except psutil.Error:
            continue
        out[p.pid] = t.user + t.system
    return out


class CpuMeter:
    """CPU seconds used by this process and its descendants inside a ``with`` block.

    Less disturbed by other jobs on the machine than wall time: it counts the work done, not the
    waiting for a core. Processes that end inside the block are not counted.
    """

    def __enter__(self) -> "CpuMeter":
        self._start = cpu_snapshot()
        return self

    def __exit__(self, *exc) -> None:
        end = cpu_snapshot()
        self.seconds = sum(v - self._start.get(pid, 0.0) for pid, v in end.items())


class PeakRSS:
    """Peak resident memory summed over a process and all its descendants, sampled by a thread.

    ``pid`` defaults to this process. ``peak`` is the largest sum seen; ``baseline`` the sum when
    sampling started; ``peak_max_process`` the largest single process seen; ``sum_of_peaks`` the
    sum over processes of each one's own largest sample (an upper bound of the true peak sum, which
    sampling may miss between two samples); ``cpu_seconds`` the CPU time (user + system) the
    processes used while sampled.
    """

    def __init__(self, pid: int | None = None, interval: float = 0.05):
        import psutil

        self._psutil = psutil
        self.proc = psutil.Process(pid)
        self.interval = interval
        self.peak = 0
        self.peak_max_process = 0
        self.baseline = 0
        self._per_pid: dict[int, int] = {}
        self._cpu_first: dict[int, float] = {}
        self._cpu_last: dict[int, float] = {}
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._loop, daemon=True)

    def sample(self) -> tuple[int, int]:
        tot, worst = 0, 0
        try:
            procs = [self.proc, *self.proc.children(recursive=True)]
        except self._psutil.Error:
            return 0, 0
        for p in procs:
            try:
                rss = p.memory_info().rss
                t = p.cpu_times()
            except self._psutil.Error:
                continue
            self._cpu_first.setdefault(p.pid, t.user + t.system)
            self._cpu_last[p.pid] = t.user + t.system
            tot += rss
            worst = max(worst, rss)
            self._per_pid[p.pid] = max(self._per_pid.get(p.pid, 0), rss)
        return tot, worst

    @property
    def sum_of_peaks(self) -> int:
        return sum(self._per_pid.values())

    @property
    def cpu_seconds(self) -> float:
        """CPU seconds used by the sampled processes between their first and last sample."""
        return sum(v - self._cpu_first[pid] for pid, v in self._cpu_last.items())

    def _loop(self) -> None:
        while not self._stop.is_set():
            tot, worst = self.sample()
            self.peak = max(self.peak, tot)
            self.peak_max_process = max(self.peak_max_process, worst)
            self._stop.wait(self.interval)

    def __enter__(self) -> "PeakRSS":
        self.baseline = self.sample()[0]
        self._per_pid.clear()  # CPU times keep their first sample: counted from here
        self._thread.start()
        return self

    def __exit__(self, *exc) -> None:
        self._stop.set()
        self._thread.join()
        self.sample()  # the last CPU times


# timings ------------------------------------------------------------------------------------------
def step_timings(run_dir: Path) -> dict[str, dict[str, float]]:
    """{step: {phase: seconds}} of the latest invocation, from a run's ledger (phases: fit, tiles, export)."""
    db = sqlite3.connect(f"file:{Path(run_dir) / 'ledger.sqlite'}?mode=ro", uri=True)
    try:
        out: dict[str, dict[str, float]] = {}
        last = "(SELECT invocation FROM timings ORDER BY time DESC LIMIT 1)"
        for name, phase, sec in db.execute(f"SELECT name, phase, seconds FROM timings WHERE invocation = {last}"):
            out.setdefault(name, {})
            out[name][phase] = out[name].get(phase, 0.0) + float(sec)
        return out
    finally:
        db.close()


def tile_seconds(run_dir: Path, step: str) -> tuple[int, float]:
    """(tiles, summed seconds inside the tile tasks) of a step's finished tiles, from the ledger."""
    db = sqlite3.connect(f"file:{Path(run_dir) / 'ledger.sqlite'}?mode=ro", uri=True)
    try:
        n, s = db.execute("SELECT count(*), coalesce(sum(seconds), 0) FROM tiles WHERE name=? AND status='done'",
                          (step,)).fetchone()
        return int(n), float(s)
    finally:
        db.close()


def model_base(run_dir: Path, step: str) -> str:
    """Path (without suffix) of the fitted model of ``step`` in a run directory."""
    found = sorted((Path(run_dir) / "models").glob(f"{step}-*.json"))
    if len(found) != 1:
        raise RuntimeError(f"expected one model of step {step!r} in {run_dir}/models. Got {found}")
    return str(found[0].with_suffix(""))


def best_of(fn: Callable[[], float], repeat: int) -> tuple[float, list[float]]:
    """Call ``fn`` (returns seconds) ``repeat`` times; return the best and all times."""
    times = [fn() for _ in range(repeat)]
    return min(times), times


def print_json(obj: dict) -> None:
    print(json.dumps(obj, default=float), flush=True)


# where the time goes in one tile --------------------------------------------------------------------
def tile_breakdown(step, src: Path, store_path: Path, model_path: str | None, tile: int,
                   index: tuple[int, int], scratch: Path, repeat: int = 3) -> dict[str, dict[str, float]]:
    """Wall and CPU seconds of each phase of one tile of ``step``, in this process, one BLAS thread.

    Phases: ``fit_read`` (zarr read of the padded window with the fit's halo and of the valid
    mask), ``fit_decode`` (the rest of the engine's block read: decoding to float32, NaN at
    nodata), ``fit_accumulate``; then ``read``, ``decode``, ``kernel``, ``encode`` and ``write`` (zarr
    write of the outputs and the valid mask into a scratch store with the engine's layout). The fit
    phases are left out when the step's fit does not read this tile (its ``select`` drops it).
    Every input of ``step`` must be an output of the source store ``src``; ``store_path`` is the
    step's store of a finished run (for its output descriptions). Returns ``{"wall": {phase: s},
    "cpu": {phase: s}}``, the best of ``repeat`` for each; CPU time counts every thread of this
    process (zarr decompresses on a thread pool) and is less disturbed by other jobs than wall time.
    """
    from threadpoolctl import threadpool_limits

    from swathmill.tiles.run import RunOptions
    from swathmill.tiles.store import TileStore, create_store, encode
    from swathmill.tiles.tasks import TileTask, load_model, read_block

    grid = TileStore(Path(src)).grid
    inputs = {alias: (str(src), ref.split("/")[1]) for alias, ref in step.inputs.items()}
    specs = TileStore(Path(store_path)).specs
    scratch_store = create_store(Path(scratch), grid, specs, RunOptions(tile=tile).layout())
    wall: dict[str, float] = {}
    cpu: dict[str, float] = {}

    def clock(name: str, fn: Callable[[], Any]) -> Any:
        res = None
        wall[name], cpu[name] = np.inf, np.inf
        for _ in range(repeat):
            res = None
            t0, c0 = time.perf_counter(), time.process_time()
            res = fn()
            wall[name] = min(wall[name], time.perf_counter() - t0)
            cpu[name] = min(cpu[name], time.process_time() - c0)
        return res

    def split(total: str, first: str, rest: str) -> None:
        for d in (wall, cpu):
            d[rest] = max(0.0, d.pop(total) - d[first])

    def raw_read(task: TileTask) -> None:
        t = task.tile
        for path, output in task.inputs.values():
            s = TileStore(Path(path))
            s.read(output, t.padded)
            s.read_valid(t.padded)

    with threadpool_limits(1):
        fit_tiles = [] if step.fit is None else [TileTask(step, index, grid, tile, step.fit.halo, inputs).tile]
        if step.fit is not None and step.fit.select is not None:
            fit_tiles = list(step.fit.select(fit_tiles, step.params))
        if fit_tiles:  # the fit reads this tile
            ftask = TileTask(step, index, grid, tile, step.fit.halo, inputs)
            clock("fit_read", lambda: raw_read(ftask))
            block = clock("fit_block", lambda: read_block(ftask))
            split("fit_block", "fit_read", "fit_decode")
            clock("fit_accumulate", lambda: step.fit.accumulate(block))
            del block
        task = TileTask(step, index, grid, tile, step.halo, inputs)
        clock("read", lambda: raw_read(task))
        block = clock("block", lambda: read_block(task))
        split("block", "read", "decode")
        model = load_model(model_path)
        res = clock("kernel", lambda: dict(step.kernel(block, model)))
        res.pop("valid", None)
        core = task.tile.crop
        enc = clock("encode", lambda: {k: encode(np.asarray(res[k])[..., core[0], core[1]], specs[k],
                                                 block.valid[core], physical=step.decode) for k in specs})

        def write() -> None:
            scratch_store.clear(task.tile.core)
            for k, arr in enc.items():
                scratch_store.write(k, task.tile.core, arr)
            scratch_store.write_valid(task.tile.core, block.valid[core])

        clock("write", write)
    return {"wall": wall, "cpu": cpu}


def format_breakdown(bd: dict[str, dict[str, float]], phases: list[str]) -> str:
    """``phase wall (cpu)`` for each phase, joined with ' + ', and the total."""
    parts = [f"{p.replace('_', ' ')} {bd['wall'][p]:.2f} ({bd['cpu'][p]:.2f})" for p in phases if p in bd["wall"]]
    tw = sum(bd["wall"][p] for p in phases if p in bd["wall"])
    tc = sum(bd["cpu"][p] for p in phases if p in bd["cpu"])
    return f"{tw:.2f} s ({tc:.2f} s CPU) = " + " + ".join(parts)
