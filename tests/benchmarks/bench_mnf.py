"""Benchmark: MNF fit plus forward transform to 20 components, against the I/O floor and in memory.

It builds an int16 cube (default 200 bands x 2048 x 2048 px = 1.68 GB; shards of one 512 px tile,
inner chunks of 256 px, zstd level 1; six smooth endmember spectra mixed with smooth random
abundances, a smooth illumination factor and band-dependent white noise, scale_factor 1e-4) as an
engine source store in a temporary folder under /tmp that it deletes at the end, and measures:

(a) the MNF step (``swathmill.workflows.methods.mnf.mnf_steps(MnfConfig(components=20))``: fit on every pixel, then the
    forward transform written as 20 float32 bands) through ``swathmill.tiles.run.Run(...).execute`` on
    ``DaskExecutor(n_workers=2, threads_per_worker=1)``, with the whole fit (the default), a
    pixel-sampled fit (``pixel_fraction``, default 0.25), a tile-sampled fit (``tile_fraction``,
    default 0.25) and both samplings together (documented options, recorded in the model's
    provenance under ``selection``; the relative difference of their eigenvalues to the whole
    fit's is printed), against the I/O floor measured on the same cluster in the same
    run: two full read passes of the cube (the faster of ``dask.array.from_zarr(...).sum()`` and a
    tile loop reading each shard with zarr) plus writing a float32 array of the output's size (20
    bands) with the same layout and codec. The floor is measured again just before each MNF run, and
    each run's ratio uses that floor (other jobs on the machine change the speed from minute to
    minute); ``--repeat`` repetitions.
(b) where the time goes in one interior tile, with one BLAS thread, in this process and again on a
    Dask worker (whose allocator settings, ``swathmill.tiles.executors.WORKER_MALLOC_ENV``, change how memory is
    mapped), wall and CPU seconds: zarr read of the tile (the fit reads no halo), decoding (none: the step reads stored values), the
    accumulator, then the forward read, kernel, encoding and write; and the scheduling share of
    the tile phase (wall time minus the time spent inside tile tasks, divided over the workers).
(c) against the in-memory approach a user would otherwise write, each in a fresh process: load the
    whole cube with zarr, decode to float32 reflectance, the horizontal and vertical shift-difference
    covariances and the data covariance (centred float32 arrays, one at a time, products by BLAS),
    ``scipy.linalg.eigh(S, N)``, project onto 20 components (kept in memory, not written), with the
    default BLAS threads (all cores). Our run
    is the MNF step on a fresh 2-worker cluster. Printed: both times and peak resident memory
    (ours summed over the client and all cluster processes, sampled every 50 ms; the in-memory one
    sampled and from the kernel's ``ru_maxrss``), their ratios, and how far the eigenvalues agree.
    ``--inmem np.cov`` uses ``numpy.cov`` in float64 instead (about twice the memory).
    CPU seconds (user + system, summed over the processes) are printed beside the wall times in
    (a) and (c): they count the work done rather than the waiting for a core, so they move less when
    other jobs load the machine.

Run::

    .venv/bin/python tests/benchmarks/bench_mnf.py            # full size (several minutes on 2 cores)
    .venv/bin/python tests/benchmarks/bench_mnf.py --quick    # 160 bands x 1024 x 1024 (0.34 GB)
    .venv/bin/python tests/benchmarks/bench_mnf.py --skip a --inmem np.cov   # only (c), numpy.cov variant

It prints measured figures and ratios, and the load average at the start and the end (other jobs on
the machine slow the runs unevenly; the ratios compare runs made in the same period).
"""
from __future__ import annotations

import argparse
import json
import os
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
VARIANTS = ("full", "pixels", "tiles", "both")  # whole fit; pixel-, tile-, and tile- and pixel-sampled fits
NAMES = {"full": "whole", "pixels": "pixel-sampled", "tiles": "tile-sampled", "both": "tile- and pixel-sampled"}


def mnf_run(run_dir: Path, src: Path, executor, tile: int, components: int, pixel_fraction: float = 1.0,
            tile_fraction: float = 1.0) -> dict:
    """The MNF step (fit + forward) through the engine; wall time of ``execute`` and its phases."""
    import _common as C

    from swathmill.tiles.run import Run, RunOptions
    from swathmill.workflows.methods.mnf import MnfConfig, mnf_steps

    cfg = MnfConfig(components=components, pixel_fraction=pixel_fraction, tile_fraction=tile_fraction)
    steps = mnf_steps(cfg, "src/refl")
    with Run(run_dir, RunOptions(tile=tile, export=False)) as run:
        t0 = time.perf_counter()
        result = run.execute(steps, executor, sources={"src": src})
        seconds = time.perf_counter() - t0
    if not result.ok:
        raise RuntimeError(f"the MNF run failed: {result.steps[-1].failed or result.messages}")
    phases = C.step_timings(run_dir)[cfg.step_name]
    ntiles, busy = C.tile_seconds(run_dir, cfg.step_name)
    with np.load(C.model_base(run_dir, cfg.step_name) + ".npz") as z:
        lam = z["eigenvalues"][:components].tolist()
        vec = z["eigenvectors"][:, :components].copy()
    model = json.loads(Path(C.model_base(run_dir, cfg.step_name) + ".json").read_text())
    return {"seconds": seconds, "fit": phases.get("fit", 0.0), "tiles": phases.get("tiles", 0.0),
            "tile_busy": busy, "ntiles": ntiles, "eigenvalues": lam, "vectors": vec, "n_pixels": model["n_pixels"],
            "selection": model["selection"]}


# children: one measurement per fresh process --------------------------------------------------------------
def child_run(run_dir: Path, src: Path, tile: int, workers: int, components: int) -> int:
    """Our MNF run on a fresh cluster, peak memory of this process and its descendants; prints JSON."""
    import _common as C

    from swathmill.tiles.executors import DaskExecutor

    t0 = time.perf_counter()
    ex = DaskExecutor(n_workers=workers, threads_per_worker=1, worker_env=C.WORKER_ENV)
    start = time.perf_counter() - t0
    try:
        with C.PeakRSS() as mem:
            res = mnf_run(run_dir, src, ex, tile, components)
    finally:
        ex.close()
    res.pop("vectors")
    C.print_json({**res, "cluster_start": start, "peak_rss": mem.peak, "sum_of_peaks": mem.sum_of_peaks,
                  "idle_rss": mem.baseline, "peak_max_process": mem.peak_max_process, "cpu": mem.cpu_seconds})
    return 0


def in_memory_mnf(src: Path, components: int, variant: str) -> dict:
    """The whole-array MNF a user would write with numpy and scipy; returns times and eigenvalues."""
    import scipy.linalg
    import zarr

    a = zarr.open_array(str(src / "refl"), mode="r")
    scale = float(a.attrs.get("scale_factor", 1e-4))
    t0 = time.perf_counter()
    cube = a[:]  # int16 (bands, rows, cols)
    t_load = time.perf_counter() - t0
    b = cube.shape[0]
    if variant == "float32":
        x = cube.astype(np.float32)
        del cube
        x *= np.float32(scale)
        noise = []
        for axis in (2, 1):  # horizontal, vertical shift differences, one at a time
            d = np.diff(x, axis=axis).reshape(b, -1)
            d -= d.mean(axis=1, dtype=np.float64).astype(np.float32)[:, None]
            noise.append((d @ d.T).astype(np.float64) / (d.shape[1] - 1))
            del d
        n_cov = 0.25 * (noise[0] + noise[1])  # half the difference covariance, both directions averaged
        X = x.reshape(b, -1)
        X -= X.mean(axis=1, dtype=np.float64).astype(np.float32)[:, None]  # centred in place
        s_cov = (X @ X.T).astype(np.float64) / (X.shape[1] - 1)
    elif variant == "np.cov":
        x = cube.astype(np.float32)
        del cube
        x *= np.float32(scale)
        n_cov = 0.25 * (np.cov(np.diff(x, axis=2).reshape(b, -1)) + np.cov(np.diff(x, axis=1).reshape(b, -1)))
        X = x.reshape(b, -1)
        s_cov = np.cov(X)
        X -= X.mean(axis=1, dtype=np.float64).astype(np.float32)[:, None]
    else:
        raise ValueError(f"variant must be 'float32' or 'np.cov'. Got {variant!r}")
    lam, vec = scipy.linalg.eigh(s_cov, n_cov)
    lam, vec = lam[::-1], vec[:, ::-1]
    y = vec[:, :components].T.astype(np.float32) @ X  # (components, pixels)
    seconds = time.perf_counter() - t0
    return {"seconds": seconds, "load": t_load, "eigenvalues": lam[:components].tolist(),
            "out_shape": list(y.shape)}


def child_inmem(src: Path, components: int, variant: str) -> int:
    import _common as C

    with C.PeakRSS() as mem:
        res = in_memory_mnf(src, components, variant)
    maxrss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024  # kB on Linux
    C.print_json({**res, "peak_rss": mem.peak, "ru_maxrss": maxrss, "idle_rss": mem.baseline,
                  "cpu": mem.cpu_seconds})
    return 0


def _child(args: list[str]) -> dict:
    proc = subprocess.run([sys.executable, str(Path(__file__).resolve()), *args], capture_output=True, text=True,
                          timeout=3600)
    if proc.returncode != 0:
        raise RuntimeError(f"child {args[0]} failed ({proc.returncode}):\n{proc.stderr[-4000:]}")
    return json.loads(proc.stdout.strip().splitlines()[-1])


def part_ab(a, src: Path, tmp: Path, reads: list, writes: list, runs: dict, nbytes: int, ex) -> None:
    """Print the summary of (a), then measure and print (b)."""
    import _common as C
    import scipy.linalg

    read = min(reads)
    write = min(writes)
    print(f"(a) I/O floor, best figures: read pass {read:.1f} s ({nbytes / read / 1e9:.2f} GB/s; from_zarr "
          f"{min(reads[0::2]):.1f} s, tile loop {min(reads[1::2]):.1f} s), write of {a.components} float32 bands "
          f"{write:.1f} s; floor = 2 x read + write = {2 * read + write:.1f} s", flush=True)
    for label in VARIANTS:
        rs = runs[label]
        best = min(rs, key=lambda r: r["seconds"])
        sel = best["selection"]
        what = {"full": "whole fit (every valid pixel, the default)",
                "pixels": f"pixel-sampled fit (pixel_fraction {sel['pixel_fraction']:g}, seed {sel['seed']}, recorded "
                          "in the model's selection)",
                "tiles": f"tile-sampled fit (tile_fraction {sel['tile_fraction']:g}: {sel['n_tiles']} tiles, seed "
                         f"{sel['seed']}, recorded in the model's selection)",
                "both": f"tile- and pixel-sampled fit (tile_fraction {sel['tile_fraction']:g}: {sel['n_tiles']} "
                        f"tiles, pixel_fraction {sel['pixel_fraction']:g}, seed {sel['seed']})"}[label]
        ratios = [r["seconds"] / r["floor"] for r in rs]
        cratios = [r["cpu"] / r["cpu_floor"] for r in rs]
        print(f"    MNF fit + forward to {a.components} components, {what}: best {best['seconds']:.1f} s (fit "
              f"{best['fit']:.1f} s on {best['n_pixels']} px, forward tiles {best['tiles']:.1f} s); ratio to the "
              f"floor measured just before, per repetition: {', '.join(f'{x:.2f}' for x in ratios)} (median "
              f"{float(np.median(ratios)):.2f}); best time / best floor = {best['seconds'] / (2 * read + write):.2f}; "
              f"CPU-time ratio per repetition: {', '.join(f'{x:.2f}' for x in cratios)}", flush=True)
    full = min(runs["full"], key=lambda r: r["seconds"])
    for label in ("pixels", "tiles", "both"):
        samp = min(runs[label], key=lambda r: r["seconds"])
        rel = np.max(np.abs(np.array(samp["eigenvalues"]) / np.array(full["eigenvalues"]) - 1))
        # principal angles between the spans of the signal components (scipy.linalg.subspace_angles): those
        # whose eigenvalue (SNR + 1) is at least 2 in the whole fit; past them the eigenvalues are all near
        # 1 and any rotation among those components is as good
        nsig = max(1, int(np.sum(np.array(full["eigenvalues"]) >= 2.0)))
        ang = {k: float(np.degrees(scipy.linalg.subspace_angles(samp["vectors"][:, :k], full["vectors"][:, :k]).max()))
               for k in sorted({1, min(3, nsig), nsig})}
        print(f"    {NAMES[label]} vs whole fit: largest relative difference of the first {a.components} eigenvalues "
              f"{rel:.2e}; largest principal angle between the spans of the first k of the {nsig} signal "
              f"components (eigenvalue >= 2): {', '.join(f'k={k}: {v:.2f} deg' for k, v in ang.items())}", flush=True)

    # (b) ---------------------------------------------------------------------------------------
    from swathmill.workflows.methods.mnf import MnfConfig, mnf_steps

    run_dir = tmp / f"run-full-{a.repeat - 1}"
    n = a.size // a.tile
    index = (1, 1) if n > 2 else (0, 0)
    step = mnf_steps(MnfConfig(components=a.components), "src/refl")[0]
    args = (step, src, run_dir / "stores" / "mnf.zarr", C.model_base(run_dir, "mnf"), a.tile, index)
    for where, bd in (("in this process", C.tile_breakdown(*args, tmp / "scratch.zarr")),
                      ("on a Dask worker", ex.client.submit(C.tile_breakdown, *args, tmp / "scratch-w.zarr",
                                                            pure=False).result())):
        print(f"(b) one tile {index} {where}, one BLAS thread, seconds wall (CPU): whole-fit accumulate "
              f"{C.format_breakdown(bd, ['fit_read', 'fit_decode', 'fit_accumulate'])}; forward "
              f"{C.format_breakdown(bd, ['read', 'decode', 'kernel', 'encode', 'write'])}", flush=True)
    busy_share = full["tile_busy"] / a.workers
    print(f"    forward tile phase of the best whole-fit run: wall {full['tiles']:.1f} s, inside tile tasks "
          f"{full['tile_busy']:.1f} s over {a.workers} workers = {busy_share:.1f} s each; scheduling and "
          f"client share {full['tiles'] - busy_share:.1f} s", flush=True)
    shutil.rmtree(tmp / "scratch.zarr", ignore_errors=True)
    shutil.rmtree(tmp / "scratch-w.zarr", ignore_errors=True)
    shutil.rmtree(run_dir, ignore_errors=True)


# main ---------------------------------------------------------------------------------------------------------
def main(argv: list[str] | None = None) -> int:
    import _common as C

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="160 bands x 1024 x 1024 px (0.34 GB)")
    ap.add_argument("--bands", type=int, default=200)
    ap.add_argument("--size", type=int, default=2048, help="rows = cols (px)")
    ap.add_argument("--tile", type=int, default=512)
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--components", type=int, default=20)
    ap.add_argument("--sample", type=float, default=0.25, help="pixel_fraction of the pixel-sampled fit")
    ap.add_argument("--tile-sample", type=float, default=0.25, help="tile_fraction of the tile-sampled fit")
    ap.add_argument("--repeat", type=int, default=2, help="alternating repetitions of (a)")
    ap.add_argument("--inmem", choices=("float32", "np.cov"), default="float32", help="in-memory approach of (c)")
    ap.add_argument("--skip", choices=("a", "c"), action="append", default=[],
                    help="skip a part: a (the floor and the runs, and b) or c (in memory); repeatable")
    ap.add_argument("--dir", type=Path, default=Path("/tmp"), help="parent of the temporary folder")
    ap.add_argument("--worker-env", action="append", default=[], metavar="KEY=VALUE",
                    help="added to the Dask workers' environment (repeatable); KEY= drops the engine's setting")
    ap.add_argument("--child-run", nargs=2, type=Path, metavar=("RUN_DIR", "SRC"), help=argparse.SUPPRESS)
    ap.add_argument("--child-inmem", type=Path, metavar="SRC", help=argparse.SUPPRESS)
    a = ap.parse_args(argv)
    env = C.set_worker_env(a.worker_env)
    if a.child_run:
        return child_run(a.child_run[0], a.child_run[1], a.tile, a.workers, a.components)
    if a.child_inmem:
        return child_inmem(a.child_inmem, a.components, a.inmem)
    if a.quick:
        a.bands, a.size = 160, 1024
    if a.size % a.tile:
        ap.error(f"--size must be a multiple of --tile. Got {a.size} and {a.tile}")
    if a.repeat < 1:
        ap.error(f"--repeat must be at least 1 (use --skip a to leave out part a). Got {a.repeat}")

    import dask
    import psutil
    import zarr

    from swathmill.tiles.executors import DaskExecutor
    from swathmill.tiles.testing import default_grid

    nbytes = a.bands * a.size * a.size * 2
    out_bytes = a.components * a.size * a.size * 4
    print(f"cube: int16 {a.bands} bands x {a.size} x {a.size} px = {C.gb(nbytes)}, tiles (= shards) of {a.tile} px "
          f"({(a.size // a.tile) ** 2} tiles), zstd level 1; output {a.components} float32 bands = "
          f"{C.gb(out_bytes)}; {a.workers} Dask worker processes x 1 thread; {os.cpu_count()} CPUs; "
          f"zarr {zarr.__version__}, dask {dask.__version__}", flush=True)
    print(f"load average at start: {C.loadavg()}", flush=True)
    print(f"worker environment: {env}", flush=True)
    tmp = Path(tempfile.mkdtemp(prefix="bench-mnf-", dir=a.dir))
    src = tmp / "cube.zarr"
    try:
        ex = DaskExecutor(n_workers=a.workers, threads_per_worker=1, worker_env=C.WORKER_ENV)
        try:
            info = C.build_cube(src, a.size, a.bands, a.tile, ex)
            print(f"built the cube in {info['seconds']:.1f} s ({C.gb(info['disk'])} on disk)", flush=True)
            grid = default_grid(a.size, a.size)
            reads, writes, runs = [], [], {v: [] for v in VARIANTS}
            # (a) -----------------------------------------------------------------------------------
            for k in range(0 if "a" in a.skip else a.repeat):
                line = []
                fractions = {"full": (1.0, 1.0), "pixels": (a.sample, 1.0), "tiles": (1.0, a.tile_sample),
                             "both": (a.sample, a.tile_sample)}
                for label, (pfrac, tfrac) in fractions.items():
                    # the floor just before each run, so that both see the same load
                    rd = C.read_pass_dask(src, "refl", a.tile, ex.client)
                    with C.CpuMeter() as cpu_read:
                        rt = C.read_pass_tiles(src, "refl", a.tile, ex)
                    with C.CpuMeter() as cpu_write:
                        w = C.write_pass(tmp / "floor.zarr", grid, a.components, a.tile, ex)
                    shutil.rmtree(tmp / "floor.zarr")
                    reads += [rd, rt]
                    writes.append(w)
                    floor = 2 * min(rd, rt) + w
                    run_dir = tmp / f"run-{label}-{k}"
                    with C.CpuMeter() as cpu_run:
                        r = mnf_run(run_dir, src, ex, a.tile, a.components, pfrac, tfrac)
                    r["floor"] = floor
                    r["cpu"] = cpu_run.seconds
                    r["cpu_floor"] = 2 * cpu_read.seconds + cpu_write.seconds
                    runs[label].append(r)
                    line.append(f"floor {floor:.1f} s (read from_zarr {rd:.1f}, tile loop {rt:.1f}, write {w:.1f}) "
                                f"then MNF, {NAMES[label]} fit {r['seconds']:.1f} s (fit {r['fit']:.1f} + tiles "
                                f"{r['tiles']:.1f}): ratio {r['seconds'] / floor:.2f}; CPU seconds {r['cpu']:.1f} "
                                f"against {r['cpu_floor']:.1f} for the floor (tile-loop reads): ratio "
                                f"{r['cpu'] / r['cpu_floor']:.2f}")
                    if k < a.repeat - 1 or label != "full":
                        shutil.rmtree(run_dir)
                print(f"  repetition {k + 1} (load {C.loadavg()}): " + "; ".join(line), flush=True)
            if "a" not in a.skip:
                part_ab(a, src, tmp, reads, writes, runs, nbytes, ex)
        finally:
            ex.close()

        # (c) ---------------------------------------------------------------------------------------
        need = (16 if a.inmem == "np.cov" else 8) * a.bands * a.size * a.size  # bytes at the peak, roughly
        if "c" in a.skip:
            pass
        elif psutil.virtual_memory().available < 1.25 * need:
            print(f"(c) skipped: the in-memory approach ({a.inmem}) needs about {C.gb(need)}; "
                  f"{C.gb(psutil.virtual_memory().available)} available", flush=True)
        else:
            print(f"    load average before (c): {C.loadavg()}", flush=True)
            ours = _child(["--child-run", str(tmp / "run-mem"), str(src), "--tile", str(a.tile), "--workers",
                           str(a.workers), "--components", str(a.components),
                           *(f"--worker-env={e}" for e in a.worker_env)])
            shutil.rmtree(tmp / "run-mem", ignore_errors=True)
            mem = _child(["--child-inmem", str(src), "--components", str(a.components), "--inmem", a.inmem])
            mem_peak = max(mem["peak_rss"], mem["ru_maxrss"])
            rel = np.max(np.abs(np.array(mem["eigenvalues"]) / np.array(ours["eigenvalues"]) - 1))
            print(f"(c) in memory ({a.inmem}; load {mem['load']:.1f} s of {mem['seconds']:.1f} s): peak RSS "
                  f"{C.gb(mem_peak)} (sampled {C.gb(mem['peak_rss'])}, ru_maxrss {C.gb(mem['ru_maxrss'])})", flush=True)
            print(f"    ours (fresh process and cluster; cluster start {ours['cluster_start']:.1f} s not counted): "
                  f"{ours['seconds']:.1f} s (fit {ours['fit']:.1f} + tiles {ours['tiles']:.1f}); peak RSS summed over "
                  f"client and cluster {C.gb(ours['peak_rss'])} (idle cluster {C.gb(ours['idle_rss'])}, largest "
                  f"process {C.gb(ours['peak_max_process'])}, sum of per-process peaks {C.gb(ours['sum_of_peaks'])})",
                  flush=True)
            print(f"    CPU seconds: ours {ours['cpu']:.1f} (all processes), in memory {mem['cpu']:.1f} (BLAS on "
                  f"every core); ratio {ours['cpu'] / mem['cpu']:.2f}", flush=True)
            print(f"    ratios ours / in memory: time {ours['seconds'] / mem['seconds']:.2f} (speed-up "
                  f"{mem['seconds'] / ours['seconds']:.2f}x), peak memory {ours['peak_rss'] / mem_peak:.2f} "
                  f"(with the sum of per-process peaks {ours['sum_of_peaks'] / mem_peak:.2f})", flush=True)
            why = " (its float32 sums lose precision; ours are float64)" if a.inmem == "float32" else ""
            print(f"    first {a.components} eigenvalues, in memory against ours: largest relative difference "
                  f"{rel:.1e}{why}", flush=True)
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    print(f"load average at end: {C.loadavg()}", flush=True)
    return 0


if __name__ == "__main__":
    # import the module by name so that worker processes unpickle its functions (and _common's)
    sys.path.insert(0, str(HERE))
    import bench_mnf

    sys.exit(bench_mnf.main())
