"""Benchmark: the whole run against its I/O floor, fused passes against unfused, the planner against both.

Run (not collected by pytest)::

    .venv/bin/python tests/benchmarks/bench_run.py [--work DIR] [--workers 2] [--size large] [--keep]

It generates (in ``--work``, a temporary folder by default, removed afterwards unless ``--keep``) the
invented scenario of ``--size`` ("large": 5 flight lines, 170 bands, 2200 x 2200 px, a cube of about
1.65 GB as int16) and a configuration with the mosaic (brightness matching), MNF, spectral angle,
spectral feature fitting, unmixing, features and one calibration (products and report off: the
figures are about the tiles). Then, side by side in the same run, on one local Dask cluster of
``--workers`` single-threaded workers:

1. ``swathmill plan --probe`` of the configuration (its time and disk estimates);
2. the whole run with fused passes, then the same run with ``engine.fuse: false`` (fresh run dirs);
3. the run's I/O floor, each part measured alone: reading the flight lines (every band, in strips,
   on the workers), writing a store of the cube's size, one read of each store per pass the plan
   counts (fused run), and writing a store of each step's output size;
4. the run's arithmetic, measured alone: on every tile of every step (and every fit tile of every
   fit), the step's inputs are read into memory untimed, then only its kernel (or its fit's
   accumulator) is timed, on the same workers; for the mosaic, which reads the flight lines itself,
   the read, resampling and blending are timed together (its line reading is then also in the I/O
   floor, so the combined floor leaves the line read out once). Worker seconds / workers is the
   arithmetic floor; I/O floor + arithmetic floor is the run's floor with its arithmetic.

It prints: wall time of each run, wall / I/O floor, wall / floor with arithmetic, fused / unfused,
and the planner's estimates against what was measured. On a machine shared with other work the
figures are noisy; the script prints the load average before and after.
"""
from __future__ import annotations

import argparse
import json
import math
import shutil
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

import _common as c  # noqa: E402

__all__ = ["main", "read_line_strip"]


def read_line_strip(task: tuple) -> int:
    """Read every band of rows ``r0:r0+n`` of a flight line (runs on a worker); returns bytes read."""
    import rasterio
    from rasterio.windows import Window

    path, r0, n = task
    with rasterio.open(path) as src:
        a = src.read(window=Window(0, r0, src.width, n))
    return int(a.nbytes)


def kernel_seconds(job: tuple) -> tuple[str, bool, float]:
    """Seconds of one step's kernel (``fit`` False) or fit accumulator (True) on one tile, inputs read
    into memory first and not timed (runs on a worker). A step that reads outside files (the mosaic) has
    its reader timed with its kernel."""
    from swathmill.tiles.tasks import load_model, read_block

    task, fit = job
    step = task.step
    if step.reader is not None and not fit:
        t0 = time.perf_counter()
        block = read_block(task)
        step.kernel(block, load_model(task.model_path))
        return step.name, fit, time.perf_counter() - t0
    block = read_block(task)
    model = None if fit else load_model(task.model_path)
    t0 = time.perf_counter()
    if fit:
        step.fit.accumulate(block)
    else:
        step.kernel(block, model)
    return step.name, fit, time.perf_counter() - t0


def arithmetic_jobs(cfg_path: Path, run_dir: Path) -> list[tuple]:
    """(TileTask, fit?) of every tile of every step, and every fit tile of every fit, of a finished run."""
    from swathmill.tiles.grid import Tiling
    from swathmill.tiles.store import TileStore
    from swathmill.tiles.tasks import TileTask
    from swathmill.workflows.app.pipeline import _planned

    _cfg, _base, _rd, plan = _planned(cfg_path)
    jobs = []
    for step in plan.steps:
        inputs = {alias: (str(run_dir / "stores" / f"{ref.split('/')[0]}.zarr"), ref.split("/")[1])
                  for alias, ref in step.inputs.items()}
        grid = TileStore(run_dir / "stores" / f"{step.name}.zarr").grid
        model = c.model_base(run_dir, step.name) if step.fit is not None else None
        jobs += [(TileTask(step, t.index, grid, plan.tile, step.halo, inputs, model_path=model), False)
                 for t in Tiling(grid, plan.tile, step.halo)]
        if step.fit is not None:
            fts = list(Tiling(grid, plan.tile, step.fit.halo))
            if step.fit.select is not None:
                fts = list(step.fit.select(fts, step.params))
            jobs += [(TileTask(step, t.index, grid, plan.tile, step.fit.halo, inputs), True) for t in fts]
    return jobs


def _config(files, root: Path, size: str, workers: int, fuse: bool, run_dir: str) -> dict:
    from swathmill.workflows.app.demo import demo_config

    cfg = demo_config(files, root, size, executor="dask")
    for k in ("endmembers",):
        cfg.pop(k, None)
    cfg["classify"].pop("svm", None)
    cfg["classify"].pop("modal_filter", None)
    cfg["execution"].update(workers=workers, memory_limit="auto")
    cfg["engine"].update(export=False, fuse=fuse)
    cfg["report"] = {"enabled": False}
    cfg["run_dir"] = run_dir
    cfg["name"] = f"bench-{size}-{'fused' if fuse else 'unfused'}"
    return cfg


def _store_bytes(path: Path) -> int:
    return sum(p.stat().st_size for p in path.rglob("*") if p.is_file())


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--work", type=Path, default=None, help="work folder (default: a temporary one)")
    p.add_argument("--workers", type=int, default=2)
    p.add_argument("--size", choices=["small", "medium", "large"], default="large")
    p.add_argument("--seed", type=int, default=7)
    p.add_argument("--keep", action="store_true", help="keep the work folder")
    args = p.parse_args(argv)

    import yaml

    from swathmill.tiles.executors import DaskExecutor
    from swathmill.tiles.store import TileStore
    from swathmill.workflows.app.pipeline import plan_config, run_config
    from swathmill.workflows.app.scenario import generate_scenario

    work = args.work or Path(tempfile.mkdtemp(prefix="swathmill-bench-run-"))
    work.mkdir(parents=True, exist_ok=True)
    print(f"load average before: {c.loadavg()}", flush=True)
    try:
        t0 = time.perf_counter()
        files = generate_scenario(work / "scenario", args.size, seed=args.seed)
        print(f"scenario {args.size} generated in {time.perf_counter() - t0:.1f} s", flush=True)
        cfgs = {}
        for fuse in (True, False):
            cfg = _config(files, work / "scenario", args.size, args.workers, fuse,
                          str(work / f"run-{'fused' if fuse else 'unfused'}"))
            path = work / "scenario" / f"bench-{'fused' if fuse else 'unfused'}.yaml"
            path.write_text(yaml.safe_dump(cfg))
            cfgs[fuse] = path

        # 1. the planner, with a probe of two tiles per step
        import io
        buf = io.StringIO()
        plan_config(cfgs[True], as_json=True, probe=True, out=buf)
        plan = json.loads(buf.getvalue())
        est_s, est_disk = plan["run"]["seconds"], plan["run"]["disk"]

        # 2. the runs
        walls = {}
        for fuse in (True, False):
            t0 = time.perf_counter()
            code = run_config(cfgs[fuse], plain=True, out=io.StringIO())
            walls[fuse] = time.perf_counter() - t0
            if code != 0:
                print(f"run (fuse={fuse}) failed with exit code {code}")
                return code
            print(f"run fuse={fuse}: {walls[fuse]:.1f} s", flush=True)
        run_dir = work / "run-fused"
        tasks_s = sum(ph.get("fit", 0.0) + ph.get("tiles", 0.0) for ph in c.step_timings(run_dir).values())
        stores = {q.name[:-5]: q for q in (run_dir / "stores").glob("*.zarr")}
        disk = sum(_store_bytes(q) for q in stores.values())

        # 3. the floor, each part alone on one cluster
        ex = DaskExecutor(n_workers=args.workers, threads_per_worker=1, retries=0)
        try:
            import rasterio
            strips = []
            for line in files.lines:
                with rasterio.open(line) as src:
                    h = src.height
                strips += [(str(line), r0, min(256, h - r0)) for r0 in range(0, h, 256)]
            t0 = time.perf_counter()
            c._map(ex, read_line_strip, strips)
            f_lines = time.perf_counter() - t0
            mosaic = TileStore(stores["mosaic"])
            tile = plan["tile"]
            grid = mosaic.grid
            cube_bytes = sum(len(s.bands) * (2 if s.dtype == "int16" else 1) for s in mosaic.specs.values())
            f_cube = c.write_pass(work / "floor-cube.zarr", grid, math.ceil(cube_bytes / 4), tile, ex)
            f_reads = 0.0
            for name, n in plan["passes"].items():
                st = TileStore(stores[name])
                out = next(iter(st.specs))
                f_reads += n * c.read_pass_tiles(stores[name], out, tile, ex)
            f_outs = 0.0
            for name, q in stores.items():
                if name == "mosaic":
                    continue
                st = TileStore(q)
                import numpy as np
                bpp = sum(len(s.bands) * np.dtype(s.dtype).itemsize for s in st.specs.values())
                f_outs += c.write_pass(work / f"floor-{name}.zarr", grid, max(1, math.ceil(bpp / 4)), tile, ex)
            # 4. the arithmetic alone (inputs in memory), every tile of every step and fit
            jobs = arithmetic_jobs(cfgs[True], run_dir)
            t0 = time.perf_counter()
            secs = c._map(ex, kernel_seconds, jobs)
            arith_wall = time.perf_counter() - t0
        finally:
            ex.close()
        floor = f_lines + f_cube + f_reads + f_outs
        per_step: dict[str, float] = {}
        for name, fit, sec in secs:  # in the order tasks finished
            key = name + (" (fit)" if fit else "")
            per_step[key] = per_step.get(key, 0.0) + sec
        arith = sum(sec for _n, _f, sec in secs) / args.workers
        full_floor = floor - f_lines + arith  # the mosaic's timed reader holds the line read
        res = {
            "size": args.size, "workers": args.workers, "cube_gb": mosaic.array("reflectance").nbytes / 1e9,
            "wall_fused_s": walls[True], "wall_unfused_s": walls[False],
            "floor_s": floor, "floor_parts_s": {"read_lines": f_lines, "write_cube": f_cube,
                                                "read_passes": f_reads, "write_outputs": f_outs},
            "passes": plan["passes"],
            "fused_over_floor": walls[True] / floor, "unfused_over_floor": walls[False] / floor,
            "arithmetic_floor_s": arith, "arithmetic_wall_s": arith_wall, "arithmetic_worker_s": per_step,
            "floor_with_arithmetic_s": full_floor,
            "fused_over_floor_with_arithmetic": walls[True] / full_floor,
            "unfused_over_floor_with_arithmetic": walls[False] / full_floor,
            "fused_over_unfused": walls[True] / walls[False],
            "plan_seconds": est_s, "measured_task_seconds": tasks_s,
            "plan_disk_bytes": est_disk, "measured_store_bytes": disk,
            "load_after": c.loadavg(),
        }
        print(json.dumps(res, indent=1, default=float), flush=True)
        print(f"I/O floor {floor:.1f} s; arithmetic alone {arith:.1f} s (worker seconds / workers; {arith_wall:.1f} s "
              f"of wall); floor with arithmetic {full_floor:.1f} s")
        print(f"whole run / floor with arithmetic: fused {res['fused_over_floor_with_arithmetic']:.2f}, unfused "
              f"{res['unfused_over_floor_with_arithmetic']:.2f}")
        print(f"whole run / I/O floor: fused {res['fused_over_floor']:.2f}, unfused {res['unfused_over_floor']:.2f}; "
              f"fused / unfused {res['fused_over_unfused']:.2f}; plan time {est_s and est_s / max(tasks_s, 1e-9):.2f} "
              f"x measured (tile and fit tasks), plan disk {est_disk / max(disk, 1):.2f} x measured")
    finally:
        if not args.keep:
            shutil.rmtree(work, ignore_errors=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
