"""Benchmark: the tiled mosaic step against plain whole-line rasterio warps, and its peak memory.

Run (not collected by pytest)::

    .venv/bin/python tests/benchmarks/bench_mosaic.py [--work DIR] [--workers 2] [--tile 512]

It generates (once, cached in ``--work``) the invented "large" scenario: 5 flight lines of 170 bands
over 2200 x 2200 pixels, a cube of 1.65 GB as int16 with every band kept. Then, in the same run:

1. the baseline: each line warped whole onto the mosaic's grid with ``rasterio.warp.reproject``
   (nearest, exact transformer, the line read through GDAL, the destination an in-memory int16
   array of the full grid), one line after another; the sum of their times;
2. the mosaic step on the Dask executor with ``--workers`` single-threaded workers, tile ``--tile``,
   without and with brightness matching, writing the Zarr cube;
3. the same mosaic for the first 3, 4 and 5 lines, recording the peak resident memory of the
   whole process tree (client and workers, sampled every 0.1 s) to see whether it grows with the
   number of lines.

It prints the measured ratios (mosaic / sum of the warps), in wall time and in CPU time (the
workers' CPU against the baseline's; on a machine shared with other work the CPU ratio is the steadier
figure), and the peak memory per line count.
"""
from __future__ import annotations

import argparse
import json
import os
import shutil
import sys
import threading
import time
from pathlib import Path

import numpy as np


class PeakMemory:
    """Peak total RSS of this process and all its children, and their CPU time, sampled in a thread.

    ``child_cpu`` is the CPU time (user + system) the child processes (Dask nannies and workers)
    used while the meter ran: their last sample minus their first (0 for a process born inside).
    """

    def __init__(self, interval: float = 0.1):
        import psutil

        self.proc = psutil.Process()
        self.interval = interval
        self.peak = 0
        self.peak_worker = 0
        self._cpu_first: dict[int, float] = {}
        self._cpu_last: dict[int, float] = {}
        self._stop = threading.Event()
        self._t = threading.Thread(target=self._run, daemon=True)

    @property
    def child_cpu(self) -> float:
        return sum(self._cpu_last[p] - self._cpu_first.get(p, 0.0) for p in self._cpu_last)

    def _sample(self, first: bool = False) -> None:
        import psutil

        total, worst = 0, 0
        try:
            children = self.proc.children(recursive=True)
        except psutil.Error:
            children = []
        for p in [self.proc, *children]:
            try:
                rss = p.memory_info().rss
                if p.pid != self.proc.pid:
                    t = p.cpu_times()
                    cpu = t.user + t.system
                    if first:
                        self._cpu_first[p.pid] = cpu
                    self._cpu_last[p.pid] = cpu
            except psutil.Error:  # a process may vanish while sampled
                continue
            total += rss
            if p.pid != self.proc.pid:
                worst = max(worst, rss)
        self.peak = max(self.peak, total)
        self.peak_worker = max(self.peak_worker, worst)

    def _run(self) -> None:
        while not self._stop.is_set():
            self._sample()
            self._stop.wait(self.interval)

    def __enter__(self) -> "PeakMemory":
        self._sample(first=True)
        self._t.start()
        return self

    def __exit__(self, *exc) -> None:
        self._stop.set()
        self._t.join()
        self._sample()


def baseline(step, lines) -> tuple[float, list[float], float]:
    """Each line warped whole onto the step's grid with rasterio (nearest, exact transformer)."""
    import rasterio
    from rasterio.enums import Resampling
    from rasterio.warp import reproject

    grid = step.grid
    times = []
    cpu0 = time.process_time()
    for ln in lines:
        t0 = time.perf_counter()
        with rasterio.open(ln.path) as ds:
            dst = np.empty((len(ln.bands), grid.rows, grid.cols), dtype=ds.dtypes[0])
            reproject(rasterio.band(ds, list(ln.bands)), dst, src_nodata=ln.nodata, dst_nodata=ln.nodata,
                      dst_transform=grid.transform, dst_crs=grid.crs, resampling=Resampling.nearest,
                      tolerance=0.0, num_threads=1)
        del dst
        times.append(time.perf_counter() - t0)
    return sum(times), times, time.process_time() - cpu0


def run_mosaic(step, run_dir: Path, workers: int, tile: int) -> tuple[float, int, int, bool, float]:
    from swathmill.tiles.executors import make_executor
    from swathmill.tiles.run import Run, RunOptions

    shutil.rmtree(run_dir, ignore_errors=True)
    ex = make_executor("dask", n_workers=workers, threads_per_worker=1, memory_limit="6GB")
    try:
        with PeakMemory() as mem:
            t0 = time.perf_counter()
            with Run(run_dir, RunOptions(tile=tile, export=False)) as run:
                result = run.execute([step], ex)
            dt = time.perf_counter() - t0
    finally:
        ex.close()
    return dt, mem.peak, mem.peak_worker, result.ok, mem.child_cpu


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--work", type=Path, default=Path(os.environ.get("TMPDIR", "/tmp")) / "swathmill-bench")
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--tile", type=int, default=512)
    ap.add_argument("--seed", type=int, default=7)
    ap.add_argument("--repeat", type=int, default=2, help="alternate baseline and mosaic this many times")
    ap.add_argument("--keep", action="store_true", help="keep the run directories")
    args = ap.parse_args(argv)

    from swathmill.workflows.methods.mosaic import MosaicConfig, build_mosaic_step
    from swathmill.workflows.app.scenario import generate_scenario

    scen_dir = args.work / f"scenario-large-{args.seed}"
    if not (scen_dir / "scenario.json").is_file():
        t0 = time.perf_counter()
        generate_scenario(scen_dir, "large", seed=args.seed)
        print(f"scenario generated in {time.perf_counter() - t0:.1f} s")
    facts = json.loads((scen_dir / "scenario.json").read_text())
    lines = [scen_dir / ln["file"] for ln in facts["lines"]]
    print(f"lines: {len(lines)}, bands: {facts['bands']}, site: {facts['grid']['rows']} x {facts['grid']['cols']} px")
    print(f"machine: {os.cpu_count()} cores, load average {os.getloadavg()[0]:.1f} (other work skews every figure)")

    def step_for(n: int, matching: bool):
        cfg = MosaicConfig(lines=[str(p) for p in lines[:n]], brightness_matching=matching, seed=args.seed)
        return build_mosaic_step(cfg)

    full = step_for(len(lines), False)
    nb = len(full.resolve_outputs({}, None)["reflectance"].bands)
    cube_gb = full.grid.rows * full.grid.cols * nb * 2 / 1e9
    print(f"cube: {full.grid.rows} x {full.grid.cols} px x {nb} bands int16 = {cube_gb:.2f} GB")

    # baseline and mosaic alternate, --repeat times; the fastest of each is the least disturbed by
    # other work on the machine, and the ratio uses those
    base_best, mos_best = float("inf"), {False: float("inf"), True: float("inf")}
    base_cpu_best, mos_cpu_best = float("inf"), {False: float("inf"), True: float("inf")}
    for rep in range(args.repeat):
        base_total, base_each, base_cpu = baseline(full, full.params.lines)
        base_best, base_cpu_best = min(base_best, base_total), min(base_cpu_best, base_cpu)
        print(f"[{rep + 1}] baseline, plain whole-line warps: {base_total:.1f} s, {base_cpu:.1f} CPU s "
              f"({', '.join(f'{t:.1f}' for t in base_each)})")
        for matching in (False, True):
            dt, peak, peak_w, ok, cpu = run_mosaic(step_for(len(lines), matching), args.work / "run",
                                                   args.workers, args.tile)
            mos_best[matching] = min(mos_best[matching], dt)
            mos_cpu_best[matching] = min(mos_cpu_best[matching], cpu)
            print(f"[{rep + 1}] mosaic ({args.workers} workers, tile {args.tile}, brightness matching "
                  f"{'on' if matching else 'off'}): {dt:.1f} s, workers' CPU {cpu:.1f} s, ok={ok}, "
                  f"peak RSS {peak / 2**30:.2f} GiB (largest worker {peak_w / 2**30:.2f} GiB)")
    for matching in (False, True):
        on = "on" if matching else "off"
        print(f"ratio, mosaic with brightness matching {on} / sum of the warps (fastest of {args.repeat}): "
              f"wall {mos_best[matching]:.1f} s / {base_best:.1f} s = {mos_best[matching] / base_best:.2f}; "
              f"CPU {mos_cpu_best[matching]:.1f} s / {base_cpu_best:.1f} s = "
              f"{mos_cpu_best[matching] / base_cpu_best:.2f}, i.e. about "
              f"{mos_cpu_best[matching] / args.workers / base_cpu_best:.2f} in wall time on "
              f"{args.workers} otherwise idle cores")
    print("peak memory against the number of lines (matching off):")
    for n in range(3, len(lines) + 1):
        step = step_for(n, False)
        dt, peak, peak_w, ok, _cpu = run_mosaic(step, args.work / "run", args.workers, args.tile)
        gb = step.grid.rows * step.grid.cols * nb * 2 / 1e9
        print(f"  {n} lines: cube {gb:.2f} GB, {dt:.1f} s, peak RSS {peak / 2**30:.2f} GiB, "
              f"largest worker {peak_w / 2**30:.2f} GiB, ok={ok}")
    print(f"load average at the end: {os.getloadavg()[0]:.1f}")
    if not args.keep:
        shutil.rmtree(args.work / "run", ignore_errors=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
