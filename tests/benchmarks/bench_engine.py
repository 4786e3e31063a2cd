"""Benchmark of the tile engine: overhead against a plain Dask copy, memory against mosaic size, resume.

It builds an int16 cube (default 200 bands x 2048 x 2048 px = 1.68 GB; zstd level 1, shards of one
tile, inner chunks of half a tile) in a Zarr store under a temporary folder that it deletes at the
end, and measures in the same run:

(a) overhead: a pass-through step (``decode=False``, the kernel returns its input) over the cube with
    the Dask executor on ``--workers`` worker processes, against ``dask.array.from_zarr(...).to_zarr(...)``
    into the same layout and codec, on the same cluster; ``--repeat`` repetitions in alternating order,
    each run after an ``os.sync()`` (the run before it leaves gigabytes of dirty pages).
    Printed: the median times, throughput, and their ratio (engine / dask); also the ratio of the best
    times and that of the CPU time used by all processes (steadier than wall time on a busy machine).
(b) memory: peak resident memory summed over a process and all its children (the Dask nanny and
    worker processes), sampled every 50 ms by a thread with psutil, for the pass-through over a cube
    of 4x the pixels against the 1x cube, each run in a fresh process with a fresh cluster. Printed:
    both peaks (and the idle cluster's) and their ratio (4x / 1x).
(c) resume: the wall time of a second invocation (a new process: start-up, cluster, the remaining
    tiles) after the first was killed with SIGKILL at about half its tiles, against an uninterrupted
    invocation in a new process (the memory run of (b)), on the 4x cube (``--resume-on 1x`` for the
    small one). Printed: both times and their ratio (resumed / uninterrupted).

Run::

    .venv/bin/python tests/benchmarks/bench_engine.py            # full size (10-20 min on 2 cores)
    .venv/bin/python tests/benchmarks/bench_engine.py --quick    # 150 x 1024 x 1024, tiles of 256 px
    .venv/bin/python tests/benchmarks/bench_engine.py --bands 160 --size 2304 --tile 512 --dir /scratch

It only prints measured figures; the project's targets are in the README and DEVELOPERS.md.
"""
from __future__ import annotations

import argparse
import json
import os
import shutil
import signal
import sqlite3
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path
from typing import Any, Callable

import numpy as np

HERE = Path(__file__).resolve().parent


# the cube -------------------------------------------------------------------------------------------
def _spectra(bands: int, k: int, seed: int) -> np.ndarray:
    """k smooth reflectance spectra (bands, k) in 1e-4 units: broad Gaussian features on a slope."""
    rng = np.random.default_rng(seed)
    wl = np.linspace(0.0, 1.0, bands)
    out = np.empty((bands, k))
    for j in range(k):
        s = 0.1 + 0.3 * rng.random() + 0.1 * wl * rng.normal()
        for _ in range(4):
            c, w, h = rng.random(), 0.03 + 0.15 * rng.random(), 0.2 * rng.normal()
            s = s + h * np.exp(-0.5 * ((wl - c) / w) ** 2)
        out[:, j] = np.clip(s, 0.01, 0.9) * 10000
    return out.astype(np.float32)


def write_cube_tile(task: tuple) -> int:
    """Write one tile of the synthetic cube (runs on a worker): mixtures of 4 spectra plus noise."""
    from swathmill.tiles.grid import Window
    from swathmill.tiles.store import TileStore

    path, row, col, rows, cols, bands, seed = task
    store = TileStore(Path(path))
    m = _spectra(bands, 4, seed)
    rng = np.random.default_rng([seed, row, col])
    yy, xx = np.mgrid[row:row + rows, col:col + cols].astype(np.float32)
    ab = np.stack([1 + np.sin(xx / 50.0), 1 + np.cos(yy / 70.0), 1 + np.sin((xx + yy) / 90.0),
                   np.full_like(xx, 0.5)])
    ab /= ab.sum(axis=0)
    cube = np.tensordot(m, ab, axes=1)
    cube += rng.integers(-60, 61, cube.shape, dtype=np.int16)
    win = Window(row, col, rows, cols)
    store.write("refl", win, np.clip(np.rint(cube), 0, 10000).astype(np.int16))
    store.write_valid(win, np.ones((rows, cols), bool))
    return rows * cols


def build_cube(path: Path, size: int, bands: int, tile: int, executor, seed: int = 11) -> float:
    """Create the cube store at ``path`` (size x size px, ``bands`` int16 bands); return seconds."""
    from swathmill.tiles.grid import Grid, Tiling
    from swathmill.tiles.store import create_store
    from swathmill.tiles.step import OutputSpec
    from swathmill.tiles.testing import default_grid

    t0 = time.perf_counter()
    grid: Grid = default_grid(size, size)
    spec = OutputSpec(bands=tuple(f"b{i + 1:03d}" for i in range(bands)), dtype="int16", nodata=-9999,
                      coords={"wavelength": tuple(float(400 + 10 * i) for i in range(bands))},
                      attrs={"scale_factor": 1e-4})
    from swathmill.tiles.run import RunOptions

    create_store(path, grid, {"refl": spec}, RunOptions(tile=tile).layout())
    tasks = [(str(path), t.core.row, t.core.col, t.core.rows, t.core.cols, bands, seed) for t in Tiling(grid, tile)]
    errors: list = []
    executor.map(write_cube_tile, tasks, lambda *_: None, lambda item, exc, tb: errors.append(tb))
    if errors:
        raise RuntimeError(errors[0])
    return time.perf_counter() - t0


# the pass-through step ------------------------------------------------------------------------------
def passthrough(block, model) -> dict:
    """Return the input unchanged (raw int16: ``decode=False``)."""
    return {"output": block.data["x"]}


def _same_spec(meta, model, params) -> dict:
    return {"output": meta["x"].spec}


def passthrough_step():
    from swathmill.tiles.step import Step

    return Step(name="copy", kernel=passthrough, outputs=_same_spec, inputs={"x": "src/refl"}, decode=False)


def run_engine(run_dir: Path, src: Path, executor, tile: int) -> tuple[float, Any]:
    from swathmill.tiles.run import Run, RunOptions

    with Run(run_dir, RunOptions(tile=tile, export=False)) as run:
        t0 = time.perf_counter()
        result = run.execute([passthrough_step()], executor, sources={"src": src})
        return time.perf_counter() - t0, result


def run_dask_copy(src: Path, out: Path, tile: int) -> float:
    """The same copy with dask.array alone: from_zarr in chunks of one shard, to_zarr, same codec."""
    import dask.array as da
    import zarr
    from zarr.codecs import ZstdCodec

    from swathmill.tiles.run import RunOptions

    lay = RunOptions(tile=tile).layout()
    a = zarr.open_array(str(src / "refl"), mode="r")
    nb = a.shape[0]
    t0 = time.perf_counter()
    x = da.from_zarr(a, chunks=(nb, tile, tile))
    target = zarr.create_array(str(out), shape=a.shape, dtype=a.dtype, chunks=(nb, lay.chunk, lay.chunk),
                               shards=(nb, lay.shard, lay.shard), compressors=[ZstdCodec(level=lay.zstd_level)],
                               fill_value=a.fill_value, zarr_format=3)
    da.to_zarr(x, target)
    return time.perf_counter() - t0


# memory ---------------------------------------------------------------------------------------------
class PeakRSS:
    """Peak of the resident memory summed over this process and all its descendants (psutil)."""

    def __init__(self, interval: float = 0.05):
        import psutil

        self._psutil = psutil
        self.interval = interval
        self.peak = 0
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._loop, daemon=True)

    def total(self) -> int:
        me = self._psutil.Process()
        tot = 0
        for p in [me, *me.children(recursive=True)]:
            try:
                tot += p.memory_info().rss
            except (self._psutil.NoSuchProcess, self._psutil.AccessDenied):
                pass
        return tot

    def _loop(self) -> None:
        while not self._stop.is_set():
            self.peak = max(self.peak, self.total())
            self._stop.wait(self.interval)

    def __enter__(self) -> "PeakRSS":
        self.baseline = self.total()
        self._thread.start()
        return self

    def __exit__(self, *exc) -> None:
        self._stop.set()
        self._thread.join()


def cpu_seconds() -> float:
    """User + system CPU time of this process and its live descendants (the cluster), psutil."""
    import psutil

    me = psutil.Process()
    tot = 0.0
    for p in [me, *me.children(recursive=True)]:
        try:
            t = p.cpu_times()
            tot += t.user + t.system
        except (psutil.NoSuchProcess, psutil.AccessDenied):
            pass
    return tot


def _cluster(workers: int):
    from swathmill.tiles.executors import DaskExecutor

    return DaskExecutor(n_workers=workers, threads_per_worker=1)


def _check_copy(src: Path, out_store: Path, rng: np.random.Generator, n: int = 3) -> None:
    """Spot-check that the output equals the input on a few random windows."""
    from swathmill.tiles.grid import Window
    from swathmill.tiles.store import open_store

    a, b = open_store(src), open_store(out_store)
    for _ in range(n):
        r, c = (int(v) for v in rng.integers(0, a.grid.rows - 64, 2))
        w = Window(r, c, 64, 64)
        if not np.array_equal(a.read("refl", w), b.read("output", w)):
            raise AssertionError(f"pass-through output differs from its input at {w}")


# resume: the invocation in a child process ------------------------------------------------------------
def child(run_dir: Path, src: Path, tile: int, workers: int) -> int:
    """One invocation in a fresh process: start a cluster, run the pass-through, print JSON.

    The peak resident memory of this process and its descendants (the cluster) is sampled during
    the run; ``idle`` is the sum once the cluster is up, before the run.
    """
    ex = _cluster(workers)
    try:
        with PeakRSS() as mem:
            seconds, result = run_engine(run_dir, src, ex, tile)
    finally:
        ex.close()
    rep = result.steps[0]
    print(json.dumps({"ok": result.ok, "done_before": rep.done_before, "computed": rep.computed,
                      "total": rep.total, "execute_seconds": seconds, "peak_rss": mem.peak,
                      "idle_rss": mem.baseline}), flush=True)
    return 0 if result.ok else 1


def _start_child(run_dir: Path, src: Path, tile: int, workers: int) -> subprocess.Popen:
    return subprocess.Popen([sys.executable, str(Path(__file__).resolve()), "--child", str(run_dir), str(src),
                             "--tile", str(tile), "--workers", str(workers)],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, start_new_session=True)


def _done(ledger: Path) -> int:
    try:
        db = sqlite3.connect(f"file:{ledger}?mode=ro", uri=True, timeout=1)
        try:
            return db.execute("SELECT count(*) FROM tiles WHERE status='done'").fetchone()[0]
        finally:
            db.close()
    except sqlite3.Error:
        return 0


def _timed_child(run_dir: Path, src: Path, tile: int, workers: int) -> tuple[float, dict]:
    t0 = time.perf_counter()
    proc = _start_child(run_dir, src, tile, workers)
    out, err = proc.communicate(timeout=1800)
    wall = time.perf_counter() - t0
    if proc.returncode != 0:
        raise RuntimeError(f"child run failed ({proc.returncode}): {err[-3000:]}")
    return wall, json.loads(out.strip().splitlines()[-1])


def measure_resume(tmp: Path, src: Path, tile: int, workers: int, total: int, full_wall: float,
                   full: dict) -> dict:
    """Kill an invocation at half its tiles, time the next one; ``full``: an uninterrupted one."""
    run_dir = tmp / "resume-cut"
    proc = _start_child(run_dir, src, tile, workers)
    half = total // 2
    t0 = time.perf_counter()
    while _done(run_dir / "ledger.sqlite") < half:
        if proc.poll() is not None:
            raise RuntimeError(f"the run ended before it was killed: {proc.communicate()[1][-3000:]}")
        if time.perf_counter() - t0 > 1800:
            raise RuntimeError("the run did not reach half its tiles in 30 min")
        time.sleep(0.01)
    os.killpg(proc.pid, signal.SIGKILL)  # the child and the cluster it started (its own session)
    proc.communicate()
    killed_wall = time.perf_counter() - t0
    done_at_kill = _done(run_dir / "ledger.sqlite")
    time.sleep(1.0)  # let the killed workers' sockets close
    resumed_wall, resumed = _timed_child(run_dir, src, tile, workers)
    if resumed["done_before"] != done_at_kill or resumed["done_before"] + resumed["computed"] != total:
        raise AssertionError(f"resume did not compute exactly the unfinished tiles: {resumed}, "
                             f"{done_at_kill} done at the kill")
    return {"full_wall": full_wall, "full_execute": full["execute_seconds"], "killed_after": killed_wall,
            "done_at_kill": done_at_kill, "resumed_wall": resumed_wall,
            "resumed_execute": resumed["execute_seconds"], "resumed_computed": resumed["computed"]}


# main -------------------------------------------------------------------------------------------------
def _gb(nbytes: float) -> str:
    return f"{nbytes / 1e9:.2f} GB"


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--bands", type=int, default=200)
    ap.add_argument("--size", type=int, default=2048, help="rows = cols of the 1x cube (px)")
    ap.add_argument("--tile", type=int, default=512)
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--repeat", type=int, default=4, help="repetitions of (a), in alternating order (even)")
    ap.add_argument("--resume-on", choices=("1x", "4x"), default="4x")
    ap.add_argument("--quick", action="store_true", help="150 bands x 1024 x 1024, tiles of 256 px")
    ap.add_argument("--dir", type=Path, default=None, help="parent folder of the temporary folder")
    ap.add_argument("--child", nargs=2, type=Path, metavar=("RUN_DIR", "SRC"), help=argparse.SUPPRESS)
    a = ap.parse_args(argv)
    if a.child:
        return child(a.child[0], a.child[1], a.tile, a.workers)
    if a.quick:
        a.bands, a.size, a.tile = 150, 1024, 256
    if a.size % a.tile:
        ap.error(f"--size must be a multiple of --tile. Got {a.size} and {a.tile}")

    import dask
    import zarr

    nbytes = a.bands * a.size * a.size * 2
    print(f"cube 1x: int16 {a.bands} bands x {a.size} x {a.size} px = {_gb(nbytes)}; 4x: {a.size * 2} x "
          f"{a.size * 2} px = {_gb(4 * nbytes)}; tiles of {a.tile} px ({(a.size // a.tile) ** 2} and "
          f"{(2 * a.size // a.tile) ** 2} tiles); {a.workers} Dask worker processes x 1 thread; "
          f"zarr {zarr.__version__}, dask {dask.__version__}; {os.cpu_count()} CPUs", flush=True)
    print(f"load average at start: {' '.join(f'{x:.1f}' for x in os.getloadavg())}", flush=True)
    tmp = Path(tempfile.mkdtemp(prefix="bench-engine-", dir=a.dir))
    rng = np.random.default_rng(5)
    try:
        src1, src4 = tmp / "cube1x.zarr", tmp / "cube4x.zarr"
        # (a) engine against dask.array on one cluster ---------------------------------------------
        ex = _cluster(a.workers)
        try:
            t = build_cube(src1, a.size, a.bands, a.tile, ex)
            print(f"built the 1x cube in {t:.1f} s ({nbytes / t / 1e9:.2f} GB/s raw)", flush=True)
            engine_times, dask_times = [], []
            engine_cpu, dask_cpu = [], []
            for k in range(a.repeat):  # alternate the order, so that neither side always goes first
                for side in (("engine", "dask") if k % 2 == 0 else ("dask", "engine")):
                    os.sync()  # the previous run's dirty pages are not flushed on this run's time
                    c0 = cpu_seconds()
                    if side == "engine":
                        te, res = run_engine(tmp / f"engine-{k}", src1, ex, a.tile)
                        engine_cpu.append(cpu_seconds() - c0)
                        if not res.ok:
                            raise RuntimeError(f"the pass-through run failed: {res.steps[0].failed}")
                        _check_copy(src1, tmp / f"engine-{k}" / "stores" / "copy.zarr", rng)
                        shutil.rmtree(tmp / f"engine-{k}")
                    else:
                        td = run_dask_copy(src1, tmp / f"dask-{k}.zarr", a.tile)
                        dask_cpu.append(cpu_seconds() - c0)
                        shutil.rmtree(tmp / f"dask-{k}.zarr")
                engine_times.append(te)
                dask_times.append(td)
                print(f"  repetition {k + 1}: engine {te:.1f} s ({engine_cpu[-1]:.1f} CPU s), dask copy {td:.1f} s "
                      f"({dask_cpu[-1]:.1f} CPU s)", flush=True)
            t = build_cube(src4, 2 * a.size, a.bands, a.tile, ex)
            print(f"built the 4x cube in {t:.1f} s ({4 * nbytes / t / 1e9:.2f} GB/s raw)", flush=True)
        finally:
            ex.close()
        te, td = float(np.median(engine_times)), float(np.median(dask_times))
        print(f"(a) pass-through over {_gb(nbytes)}, median of {a.repeat}: engine {te:.1f} s "
              f"({nbytes / te / 1e9:.2f} GB/s), dask from_zarr/to_zarr {td:.1f} s ({nbytes / td / 1e9:.2f} GB/s); "
              f"ratio engine/dask = {te / td:.2f} (of the best times: {min(engine_times) / min(dask_times):.2f}; "
              f"of the median CPU seconds of all processes: {np.median(engine_cpu) / np.median(dask_cpu):.2f})",
              flush=True)

        # (b) memory: each cube in a fresh process with a fresh cluster ------------------------------
        w1, m1 = _timed_child(tmp / "memory-1x", src1, a.tile, a.workers)
        w4, m4 = _timed_child(tmp / "memory-4x", src4, a.tile, a.workers)
        for d in ("memory-1x", "memory-4x"):
            shutil.rmtree(tmp / d)
        print(f"(b) peak resident memory, all processes: 1x {_gb(m1['peak_rss'])} (idle cluster "
              f"{_gb(m1['idle_rss'])}, run {m1['execute_seconds']:.1f} s), 4x {_gb(m4['peak_rss'])} (idle "
              f"{_gb(m4['idle_rss'])}, run {m4['execute_seconds']:.1f} s); ratio 4x/1x = "
              f"{m4['peak_rss'] / m1['peak_rss']:.2f}", flush=True)

        # (c) resume --------------------------------------------------------------------------------
        src = src4 if a.resume_on == "4x" else src1
        total = ((2 if a.resume_on == "4x" else 1) * a.size // a.tile) ** 2
        # the uninterrupted invocation is the memory run of the same cube (a fresh process as well)
        full = (w4, m4) if a.resume_on == "4x" else (w1, m1)
        r = measure_resume(tmp, src, a.tile, a.workers, total, *full)
        print(f"(c) resume on the {a.resume_on} cube ({total} tiles): uninterrupted invocation {r['full_wall']:.1f} s "
              f"(execute {r['full_execute']:.1f} s); killed after {r['killed_after']:.1f} s with "
              f"{r['done_at_kill']} tiles recorded; second invocation {r['resumed_wall']:.1f} s (execute "
              f"{r['resumed_execute']:.1f} s, {r['resumed_computed']} tiles); ratio resumed/uninterrupted = "
              f"{r['resumed_wall'] / r['full_wall']:.2f}", flush=True)
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    print(f"load average at end: {' '.join(f'{x:.1f}' for x in os.getloadavg())}", flush=True)
    return 0


if __name__ == "__main__":
    # run the importable module, so that workers unpickle the kernel as bench_engine.passthrough
    sys.path.insert(0, str(HERE))
    import bench_engine

    sys.exit(bench_engine.main())
