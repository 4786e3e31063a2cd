"""Benchmark: spectral angle against the I/O floor, and tiled SVM prediction against sklearn in memory.

It works in a temporary folder under /tmp that it deletes at the end, on
``DaskExecutor(n_workers=2, threads_per_worker=1)``, tiles (= shards) of 512 px:

(a) Spectral angle. An int16 cube (default 200 bands x 2048 x 2048 px = 1.68 GB; six smooth endmember
    spectra mixed with smooth random abundances, a smooth illumination factor and band-dependent
    noise, scale_factor 1e-4, wavelength and fwhm coordinates; see ``_common.py``) and a spectral
    library of 20 spectra at the cube's wavelengths (the six endmembers and 14 other smooth spectra).
    The step ``swathmill.workflows.methods.classify.sam_step`` (threshold 0.1 rad; outputs the class map and 20 angle
    bands) through ``swathmill.tiles.run.Run(...).execute``, against the I/O floor measured on the same
    cluster just before each run: one read pass of the cube (the faster of ``dask.array.from_zarr(
    ...).sum()`` and a tile loop reading each shard with zarr); ``--repeat`` repetitions.
(b) Where the time of one interior tile of the spectral angle step goes (zarr read, decoding,
    kernel, encoding, zarr write; wall and CPU seconds) with one BLAS thread, in this process and
    again on a Dask worker (whose allocator settings, ``swathmill.tiles.executors.WORKER_MALLOC_ENV``, change how
    memory is mapped), and the scheduling share of the tile phase.
(c) SVM prediction. A store of 20 float32 bands shaped like MNF components (default 2048 x 2048 =
    4.2 million pixels; six classes in smooth patches, class means that shrink with the component
    index, smooth within-class variation and unit noise), a sample table of labelled pixels in
    spatial blocks, and ``swathmill.workflows.methods.classify.svm_step`` (standardised RBF SVC, C and gamma from a
    small grid by blocked cross-validation, at most 300 samples per class). After a first run (fit
    and tiles), the time of its tile phase alone on the 2 workers (the store removed, the fitted
    model loaded; reading, predicting, writing the class map) against ``Pipeline.predict`` of the
    same fitted model on the same pixels, already in memory as float64, in this one process,
    ``--repeat`` alternating times. Both class maps are compared pixel by pixel.

Run::

    .venv/bin/python tests/benchmarks/bench_classify.py            # full size (several minutes)
    .venv/bin/python tests/benchmarks/bench_classify.py --quick    # 160 bands x 1024 x 1024, 1 M pixels

Beside wall times it prints CPU seconds (user + system over the process tree), which count the work
rather than the waiting for a core and so move less when other jobs load the machine. It prints
measured figures and ratios, and the load average at the start and the end (other jobs on
the machine slow the runs unevenly; the ratios compare runs made in the same period).
"""
from __future__ import annotations

import argparse
import os
import shutil
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent

N_CLASSES = 6
N_COMP = 20
SEPARATION = 8.0  # class-mean spread of the first component, in noise standard deviations


def arithmetic_floor(src: Path, tile: int, index: tuple[int, int], lib, chunk: int = 4096) -> dict:
    """Seconds of the unavoidable arithmetic of the spectral angle on one tile, best of 3, one BLAS thread.

    The tile is read once (timed too); then, over chunks of ``chunk`` pixels as the kernel works (a
    workspace that stays in cache), the cast of the stored values to float32, the product with the
    unit reference vectors, the pixel norms and the arccos of the cosines, each phase timed alone
    (no masks, no refinement, no class assignment, no writing).
    """
    from threadpoolctl import threadpool_limits

    from swathmill.tiles.grid import Tiling
    from swathmill.tiles.store import open_store

    st = open_store(src)
    t = next(x for x in Tiling(st.grid, tile, 0) if x.index == tuple(index))
    r = np.asarray(lib.spectra, dtype=np.float64)
    u = (r / np.linalg.norm(r, axis=1, keepdims=True)).astype(np.float32)
    best: dict[str, float] = {}
    with threadpool_limits(1):
        for _ in range(3):
            t0 = time.perf_counter()
            raw = st.read("refl", t.core)
            best["read"] = min(best.get("read", np.inf), time.perf_counter() - t0)
            flat = raw.reshape(raw.shape[0], -1)
            x = np.empty((flat.shape[0], chunk), np.float32)
            d = np.empty((u.shape[0], chunk), np.float32)
            nrm = np.empty(chunk, np.float32)
            spent = dict.fromkeys(("cast", "matmul", "norms", "arccos"), 0.0)
            for s in range(0, flat.shape[1] - chunk + 1, chunk):
                t0 = time.perf_counter()
                np.copyto(x, flat[:, s:s + chunk], casting="unsafe")
                t1 = time.perf_counter()
                np.matmul(u, x, out=d)
                t2 = time.perf_counter()
                np.einsum("bc,bc->c", x, x, out=nrm)
                np.sqrt(nrm, out=nrm)
                t3 = time.perf_counter()
                d /= nrm
                np.clip(d, -1, 1, out=d)
                np.arccos(d, out=d)
                t4 = time.perf_counter()
                for k, v in zip(spent, (t1 - t0, t2 - t1, t3 - t2, t4 - t3)):
                    spent[k] += v
            for k, v in spent.items():
                best[k] = min(best.get(k, np.inf), v)
    best["total"] = best["cast"] + best["matmul"] + best["norms"] + best["arccos"]
    return best


# the component store ------------------------------------------------------------------------------------
def _class_means(seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    return rng.normal(size=(N_CLASSES, N_COMP)) * (SEPARATION * np.exp(-np.arange(N_COMP) / 4.0))


def class_truth(rows: np.ndarray, cols: np.ndarray, seed: int) -> np.ndarray:
    """Class code 1..N_CLASSES at global pixel positions (broadcast): the largest of smooth fields."""
    import _common as C

    return np.argmax(C.smooth_fields(rows, cols, N_CLASSES, seed + 1), axis=0).astype(np.int32) + 1


def components(rows: np.ndarray, cols: np.ndarray, seed: int) -> np.ndarray:
    """MNF-like components (N_COMP, *shape) float32 at global pixel positions (broadcast)."""
    import _common as C

    cls = class_truth(rows, cols, seed) - 1
    x = np.moveaxis(_class_means(seed)[cls], -1, 0).astype(np.float32)
    x += 0.8 * C.smooth_fields(rows, cols, N_COMP, seed + 2, scale=30.0)
    r = np.asarray(rows).ravel()[:1]
    c = np.asarray(cols).ravel()[:1]
    rng = np.random.default_rng([seed, int(r[0]), int(c[0]), x.size])
    x += rng.standard_normal(x.shape, dtype=np.float32)
    return x


def write_components_tile(task: tuple) -> int:
    """Write one tile of the component store (runs on a worker)."""
    from swathmill.tiles.grid import Window
    from swathmill.tiles.store import TileStore

    path, row, col, rows, cols, seed = task
    x = components(np.arange(row, row + rows)[:, None], np.arange(col, col + cols)[None, :], seed)
    store = TileStore(Path(path))
    win = Window(row, col, rows, cols)
    store.write("comp", win, x)
    store.write_valid(win, np.ones((rows, cols), bool))
    return rows * cols


def build_components(path: Path, size: int, tile: int, executor, seed: int = 5) -> float:
    import _common as C

    from swathmill.tiles.grid import Tiling
    from swathmill.tiles.run import RunOptions
    from swathmill.tiles.step import OutputSpec
    from swathmill.tiles.store import create_store
    from swathmill.tiles.testing import default_grid

    t0 = time.perf_counter()
    grid = default_grid(size, size)
    spec = OutputSpec(bands=tuple(f"mnf_{i + 1}" for i in range(N_COMP)), dtype="float32", nodata=float("nan"))
    create_store(path, grid, {"comp": spec}, RunOptions(tile=tile).layout())
    tasks = [(str(path), t.core.row, t.core.col, t.core.rows, t.core.cols, seed) for t in Tiling(grid, tile)]
    C._map(executor, write_components_tile, tasks)
    return time.perf_counter() - t0


def sample_table(size: int, seed: int = 5, block: int = 128, per_block: int = 24):
    """Labelled pixels: ``per_block`` random pixels in each ``block`` px square (its group id)."""
    from swathmill.workflows.inputs.reference import SampleTable

    rng = np.random.default_rng(seed + 100)
    nb = size // block
    bi, bj = np.meshgrid(np.arange(nb), np.arange(nb), indexing="ij")
    group = np.repeat((bi * nb + bj).ravel(), per_block)
    rows = np.repeat(bi.ravel() * block, per_block) + rng.integers(0, block, group.size)
    cols = np.repeat(bj.ravel() * block, per_block) + rng.integers(0, block, group.size)
    label = class_truth(rows, cols, seed)
    return SampleTable(row=rows.astype(np.int64), col=cols.astype(np.int64), label=label.astype(np.int32),
                       group=group.astype(np.int64), feature=group.astype(np.int64),
                       split=np.ones(group.size, np.uint8), class_names=tuple(f"class_{i + 1}" for i in range(N_CLASSES)))


# runs ---------------------------------------------------------------------------------------------------------
def run_steps(run_dir: Path, steps: list, src: Path, executor, tile: int) -> float:
    from swathmill.tiles.run import Run, RunOptions

    with Run(run_dir, RunOptions(tile=tile, export=False)) as run:
        t0 = time.perf_counter()
        result = run.execute(steps, executor, sources={"src": src})
        seconds = time.perf_counter() - t0
    if not result.ok:
        raise RuntimeError(f"the run failed: {result.steps[-1].failed or result.messages}")
    return seconds


def library(bands: int, endmembers: np.ndarray):
    import _common as C

    from swathmill.workflows.inputs.library import SpectralLibrary

    wl, _ = C.wavelengths(bands)
    spectra = np.vstack([endmembers, C.smooth_spectra(bands, 20 - len(endmembers), seed=99)])
    return SpectralLibrary(names=tuple(f"material_{i + 1:02d}" for i in range(20)), wavelengths=wl, spectra=spectra,
                           source="<benchmark>")


def main(argv: list[str] | None = None) -> int:
    import _common as C

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="160 bands x 1024 x 1024 px; SVM on 1024 x 1024 px")
    ap.add_argument("--bands", type=int, default=200)
    ap.add_argument("--size", type=int, default=2048, help="rows = cols of the cube (px)")
    ap.add_argument("--svm-size", type=int, default=2048, help="rows = cols of the component store (px)")
    ap.add_argument("--tile", type=int, default=512)
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--repeat", type=int, default=2, help="alternating repetitions of (a)")
    ap.add_argument("--skip", choices=("sam", "svm"), action="append", default=[], help="skip a part")
    ap.add_argument("--dir", type=Path, default=Path("/tmp"), help="parent of the temporary folder")
    ap.add_argument("--worker-env", action="append", default=[], metavar="KEY=VALUE",
                    help="added to the Dask workers' environment (repeatable); KEY= drops the engine's setting")
    a = ap.parse_args(argv)
    env = C.set_worker_env(a.worker_env)
    if a.quick:
        a.bands, a.size, a.svm_size = 160, 1024, 1024
    for s in (a.size, a.svm_size):
        if s % a.tile:
            ap.error(f"sizes must be multiples of --tile. Got {s} and {a.tile}")

    import dask
    import zarr

    from swathmill.tiles.executors import DaskExecutor
    from swathmill.tiles.store import open_store
    from swathmill.workflows.methods.classify import load_svm, sam_step, svm_step

    nbytes = a.bands * a.size * a.size * 2
    print(f"cube: int16 {a.bands} bands x {a.size} x {a.size} px = {C.gb(nbytes)}; components: {N_COMP} float32 "
          f"bands x {a.svm_size} x {a.svm_size} px ({a.svm_size ** 2 / 1e6:.1f} M pixels); tiles (= shards) of "
          f"{a.tile} px; {a.workers} Dask worker processes x 1 thread; {os.cpu_count()} CPUs; zarr "
          f"{zarr.__version__}, dask {dask.__version__}", flush=True)
    print(f"load average at start: {C.loadavg()}", flush=True)
    print(f"worker environment: {env}", flush=True)
    tmp = Path(tempfile.mkdtemp(prefix="bench-classify-", dir=a.dir))
    ex = DaskExecutor(n_workers=a.workers, threads_per_worker=1, worker_env=C.WORKER_ENV)
    try:
        if "sam" not in a.skip:
            # (a) ---------------------------------------------------------------------------------------
            src = tmp / "cube.zarr"
            info = C.build_cube(src, a.size, a.bands, a.tile, ex)
            print(f"built the cube in {info['seconds']:.1f} s ({C.gb(info['disk'])} on disk)", flush=True)
            lib = library(a.bands, info["endmembers"])
            reads, sams = [], []
            for k in range(a.repeat):
                # the floor just before each run, so that both see the same load
                rd = C.read_pass_dask(src, "refl", a.tile, ex.client)
                with C.CpuMeter() as cpu_read:
                    rt = C.read_pass_tiles(src, "refl", a.tile, ex)
                run_dir = tmp / f"sam-{k}"
                with C.CpuMeter() as cpu_run:
                    t = run_steps(run_dir, [sam_step("sam", "src/refl", library=lib, threshold=0.1)], src, ex, a.tile)
                ph = C.step_timings(run_dir)["sam"]
                reads += [rd, rt]
                sams.append({"seconds": t, "tiles": ph.get("tiles", 0.0), "busy": C.tile_seconds(run_dir, "sam")[1],
                             "floor": min(rd, rt), "cpu": cpu_run.seconds, "cpu_floor": cpu_read.seconds})
                print(f"  repetition {k + 1} (load {C.loadavg()}): read pass from_zarr {rd:.1f} s, tile loop {rt:.1f} s; "
                      f"then spectral angle {t:.1f} s (tile phase {ph.get('tiles', 0.0):.1f} s): ratio "
                      f"{t / min(rd, rt):.2f}; CPU seconds {cpu_run.seconds:.1f} against {cpu_read.seconds:.1f} for "
                      f"the tile-loop read: ratio {cpu_run.seconds / cpu_read.seconds:.2f}", flush=True)
                if k < a.repeat - 1:
                    shutil.rmtree(run_dir)
            read = min(reads)
            best = min(sams, key=lambda r: r["seconds"])
            ratios = [r["seconds"] / r["floor"] for r in sams]
            cratios = [r["cpu"] / r["cpu_floor"] for r in sams]
            sstore = open_store(run_dir / "stores" / "sam.zarr")
            counts = np.bincount(sstore.read("classes", sstore.grid.full).ravel(), minlength=21)
            print(f"(a) one read pass, best (from_zarr {min(reads[0::2]):.1f} s, tile loop {min(reads[1::2]):.1f} s): "
                  f"{read:.1f} s ({nbytes / read / 1e9:.2f} GB/s); spectral angle step, 20 references: best "
                  f"{best['seconds']:.1f} s (tile phase {best['tiles']:.1f} s); ratio to the read pass measured just "
                  f"before, per repetition: {', '.join(f'{x:.2f}' for x in ratios)} (median "
                  f"{float(np.median(ratios)):.2f}); best time / best read = {best['seconds'] / read:.2f}; CPU-time "
                  f"ratio per repetition: {', '.join(f'{x:.2f}' for x in cratios)}", flush=True)
            print(f"    pixels per class 0 (unclassified), 1..20: {counts.tolist()}", flush=True)
            # (b) ---------------------------------------------------------------------------------------
            n = a.size // a.tile
            index = (1, 1) if n > 2 else (0, 0)
            step = sam_step("sam", "src/refl", library=lib, threshold=0.1)
            args = (step, src, run_dir / "stores" / "sam.zarr", C.model_base(run_dir, "sam"), a.tile, index)
            for where, bd in (("in this process", C.tile_breakdown(*args, tmp / "scratch.zarr")),
                              ("on a Dask worker", ex.client.submit(C.tile_breakdown, *args, tmp / "scratch-w.zarr",
                                                                    pure=False).result())):
                print(f"(b) one tile {index} {where}, one BLAS thread, seconds wall (CPU): "
                      f"{C.format_breakdown(bd, ['read', 'decode', 'kernel', 'encode', 'write'])}", flush=True)
            lb = ex.client.submit(arithmetic_floor, src, a.tile, index, lib, pure=False).result()
            print(f"    arithmetic alone on that tile, on a Dask worker, data already read, chunks of 4096 px: int16 to float32 "
                  f"{lb['cast']:.3f} s + one float32 matrix product with the 20 unit references {lb['matmul']:.3f} s "
                  f"+ pixel norms {lb['norms']:.3f} s + cosines and arccos {lb['arccos']:.3f} s = {lb['total']:.3f} s, "
                  f"{lb['total'] / lb['read']:.2f} of the tile's zarr read ({lb['read']:.3f} s)", flush=True)
            last = sams[-1]
            print(f"    tile phase of the last run: wall {last['tiles']:.1f} s, inside tile tasks {last['busy']:.1f} s "
                  f"over {a.workers} workers = {last['busy'] / a.workers:.1f} s each; scheduling and client share "
                  f"{last['tiles'] - last['busy'] / a.workers:.1f} s", flush=True)
            shutil.rmtree(tmp / "scratch.zarr", ignore_errors=True)
            shutil.rmtree(tmp / "scratch-w.zarr", ignore_errors=True)
            shutil.rmtree(run_dir, ignore_errors=True)
            shutil.rmtree(src, ignore_errors=True)

        if "svm" not in a.skip:
            # (c) ---------------------------------------------------------------------------------------
            comp = tmp / "components.zarr"
            t = build_components(comp, a.svm_size, a.tile, ex)
            print(f"built the component store in {t:.1f} s", flush=True)
            table = sample_table(a.svm_size)
            step = svm_step("svm", "src/comp", samples=table, C=[10.0, 100.0], gamma=[0.01, 0.03], folds=3,
                            max_per_class=300)
            run_dir = tmp / "svm"
            t_run = run_steps(run_dir, [step], comp, ex, a.tile)  # fit + tiles (workers warm up here)
            t_fit = C.step_timings(run_dir)["svm"].get("fit", 0.0)
            from swathmill.tiles.tasks import load_model

            model = load_model(C.model_base(run_dir, "svm"))
            clf = load_svm(model)["classifier"]
            store = open_store(comp)
            X = store.read("comp", store.grid.full)
            X = np.ascontiguousarray(X.reshape(N_COMP, -1).T, dtype=np.float64)  # (pixels, 20), in memory
            print(f"(c) SVM: {model['n_train']} training samples, best {model['best']} (blocked CV score "
                  f"{model['cv_score']:.3f}), {int(clf[-1].n_support_.sum())} support vectors; first run {t_run:.1f} s "
                  f"(fit {t_fit:.1f} s)", flush=True)
            speed, work = [], []
            for k in range(a.repeat):
                # the tile phase alone: the store is removed, the fitted model is loaded from the run
                shutil.rmtree(run_dir / "stores" / "svm.zarr")
                with C.CpuMeter() as cpu_tiles:
                    run_steps(run_dir, [step], comp, ex, a.tile)
                ph = C.step_timings(run_dir)["svm"]
                _, busy = C.tile_seconds(run_dir, "svm")
                with C.CpuMeter() as cpu_pred:
                    t0 = time.perf_counter()
                    pred = clf.predict(X)
                    t_pred = time.perf_counter() - t0
                speed.append(t_pred / ph["tiles"])
                work.append(cpu_pred.seconds / cpu_tiles.seconds)
                print(f"  repetition {k + 1} (load {C.loadavg()}): tile phase {ph['tiles']:.1f} s on {a.workers} workers "
                      f"(inside tile tasks {busy:.1f} s; CPU {cpu_tiles.seconds:.1f} s, all processes); then sklearn "
                      f"predict in one process on {X.shape[0]} pixels in memory {t_pred:.1f} s "
                      f"({t_pred / X.shape[0] * 1e6:.1f} us/px; CPU {cpu_pred.seconds:.1f} s): speed-up "
                      f"{speed[-1]:.2f}x; CPU seconds predict / tiled {work[-1]:.2f}", flush=True)
            tiled = open_store(run_dir / "stores" / "svm.zarr").read("classes", store.grid.full).ravel()
            differ = int(np.sum(tiled != pred))
            truth = class_truth(np.arange(a.svm_size)[:, None], np.arange(a.svm_size)[None, :], 5).ravel()
            print(f"    speed-up of the tiled step's tile phase on {a.workers} workers over sklearn predict in memory, "
                  f"per repetition: {', '.join(f'{x:.2f}x' for x in speed)} (best {max(speed):.2f}x); CPU seconds "
                  f"predict / tiled: {', '.join(f'{x:.2f}' for x in work)} (with {a.workers} free cores the speed-up "
                  f"approaches {a.workers} x this); class maps differ at {differ} pixels; accuracy against the truth "
                  f"{np.mean(pred == truth):.3f}", flush=True)
    finally:
        ex.close()
        shutil.rmtree(tmp, ignore_errors=True)
    print(f"load average at end: {C.loadavg()}", flush=True)
    return 0


if __name__ == "__main__":
    # import the module by name so that worker processes unpickle its functions (and _common's)
    sys.path.insert(0, str(HERE))
    import bench_classify

    sys.exit(bench_classify.main())
