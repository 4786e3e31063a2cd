"""Benchmark: products written in the background against products written before the next step starts.

Run (not collected by pytest)::

    .venv/bin/python tests/benchmarks/bench_export.py              # 12 lines x 200 bands, 2 GB of input
    .venv/bin/python tests/benchmarks/bench_export.py --gb 0.5 --dir /scratch

It makes the campaign benchmark's invented flight lines (``bench_campaign.py``: int16, overlapping
north-south lines, the same whole pipeline with COG export on) in a temporary folder (``--dir`` its
parent, removed afterwards), then runs the same configuration with ``swathmill run`` on a local Dask
cluster of ``--workers`` workers, side by side in one invocation: ``engine.export_background: false``
(each step's products are written before the next step starts) then ``true`` (they are written while
the next steps run), ``--repeat`` times in that order. It prints each run's wall time, the seconds the
workers spent exporting (from the ledger), the ratio background / before-next-step, and whether the
products' pixels are the same in both runs.
"""
from __future__ import annotations

import argparse
import json
import shutil
import statistics
import sys
import tempfile
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

import _common as c  # noqa: E402

__all__ = ["main"]


def main(argv: list[str] | None = None) -> int:
    import bench_campaign as bc
    import yaml

    from swathmill.tiles.executors import DaskExecutor

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--lines", type=int, default=12)
    ap.add_argument("--bands", type=int, default=200)
    ap.add_argument("--gb", type=float, default=2.0, help="GB of int16 input over all lines (default 2)")
    ap.add_argument("--tile", type=int, default=512)
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--repeat", type=int, default=1)
    ap.add_argument("--seed", type=int, default=13)
    ap.add_argument("--dir", type=Path, default=None)
    ap.add_argument("--out", type=Path, default=Path("bench_export.json"))
    a = ap.parse_args(argv)

    lay = bc.Layout.sized(a.lines, a.bands, a.gb, a.seed)
    work = Path(tempfile.mkdtemp(prefix="swathmill-bench-export-", dir=a.dir))
    res: dict = {"input_bytes": lay.lines * lay.line_bytes(), "workers": a.workers, "load_start": c.loadavg(),
                 "runs": []}
    try:
        root = work / "campaign"
        paths, _facts = bc.write_lines(root, lay, a.workers)
        bc.write_library(root / "library.csv", lay.bands)
        ref = root / "reference.geojson"
        bc.write_reference(ref, lay, lay.lines, 40)
        files = bc.Files(root, tuple(paths), root / "library.csv", ref, a.seed)
        print(f"{lay.lines} lines x {lay.bands} bands, {c.gb(res['input_bytes'])} of input; load {c.loadavg()}",
              flush=True)
        log = work / "runs.log"
        hashes: dict[bool, dict] = {}
        for rep in range(a.repeat):
            for background in (False, True):
                run_dir = work / f"run-{'bg' if background else 'fg'}"
                shutil.rmtree(run_dir, ignore_errors=True)
                cfg = bc.run_configuration(files, run_dir, "bench-export", a.workers, a.tile, True)
                cfg["engine"]["export_background"] = background
                path = root / f"run-{'bg' if background else 'fg'}.yaml"
                path.write_text(yaml.safe_dump(cfg, sort_keys=False))
                r = bc.run_child(path, log, f"background={background}")
                export_s = sum(p.get("export", 0.0) for p in c.step_timings(run_dir).values())
                res["runs"].append({"background": background, "repeat": rep, "wall_s": r["wall_s"],
                                    "export_worker_s": export_s, "peak_worker_bytes": r["peak_worker_bytes"]})
                print(f"background={background}: {r['wall_s']:.1f} s (exports {export_s:.1f} worker-s, worker peak "
                      f"{c.gb(r['peak_worker_bytes'])}); load {c.loadavg()}", flush=True)
                if rep == 0:
                    hx = DaskExecutor(n_workers=a.workers, threads_per_worker=1, retries=0)
                    try:
                        cogs = [str(p) for p in sorted((run_dir / "products").glob("*.tif"))]
                        hashes[background] = {k: v["pixels"] for k, v in c._map(hx, bc.hash_cog, cogs)}
                    finally:
                        hx.close()
        fg = statistics.median(r["wall_s"] for r in res["runs"] if not r["background"])
        bg = statistics.median(r["wall_s"] for r in res["runs"] if r["background"])
        same = hashes[False] == hashes[True] and bool(hashes[False])
        res.update(wall_before_next_step_s=fg, wall_background_s=bg, ratio=bg / fg, products_same_pixels=same,
                   products=len(hashes[False]), load_end=c.loadavg())
        a.out.write_text(json.dumps(res, indent=1))
        print(f"background / before the next step: {bg:.1f} / {fg:.1f} s = {bg / fg:.3f} (medians of {a.repeat}); "
              f"{len(hashes[False])} products, same pixels: {'yes' if same else 'NO'}; figures in {a.out.resolve()}")
    finally:
        shutil.rmtree(work, ignore_errors=True)
    return 0


if __name__ == "__main__":
    # run the importable module, so that workers unpickle the task functions as bench_export.*
    import bench_export

    sys.exit(bench_export.main())
