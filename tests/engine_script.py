"""A small fixed pipeline run through the engine: the helper of the engine's tests and benchmark.

Not collected by pytest (no ``test_`` prefix). The tests import it (its steps and source maker are
plain module-level functions, so Dask workers can unpickle them when this folder is on their path)
and run it as a script in a subprocess that they kill with SIGKILL and start again::

    python tests/engine_script.py RUN_DIR [--executor local|dask] [--address tcp://...]
        [--sleep SECONDS] [--tile 16] [--size 5] [--no-export]

The input cube is made deterministically from ``--seed`` into ``RUN_DIR-src.zarr`` (beside the run
directory, inside the caller's temporary folder) unless it exists. The pipeline::

    scaled   per-pixel band transform of the int16 source (decoded with its scale factor)
    smooth   k x k mean filter of ``scaled`` (halo k // 2)
    centred  ``smooth`` minus its per-band mean over the whole mosaic (a fit: sum and count per tile)
    classes  band 0 of ``centred`` cut at two thresholds into classes 1..3 (a class map)
    cleaned  k x k modal filter of ``classes`` (halo k // 2)

The script prints one JSON line (per step: key, total, done before, computed, failed, invalidated;
and the run's messages) and exits 0 only when every tile of every step finished.
``--sleep`` slows each tile by that many seconds (half before the task, half after the write and
before the ledger record) through the executor, so the step keys do not change with it.
"""
from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path
from typing import Any

import numpy as np

from swathmill.tiles.executors import LocalExecutor, make_executor
from swathmill.tiles.grid import Grid
from swathmill.tiles.ops import band_transform_step, mean_filter_step, modal_filter_step
from swathmill.tiles.run import Run, RunOptions, RunResult
from swathmill.tiles.step import Block, Fit, OutputSpec, Step
from swathmill.tiles.testing import default_grid, write_source_store

__all__ = ["ROWS", "COLS", "BANDS", "CLASS_NAMES", "make_cube", "make_source", "build_steps", "run_pipeline",
           "SlowLocalExecutor", "failing_step", "merge_order_step", "FAIL_TILES", "main"]

ROWS, COLS, BANDS = 64, 80, 4
CLASS_NAMES = ("low", "middle", "high")
THRESHOLDS = (-0.04, 0.04)
CONFIG_HASH = "enginetest0001"


def make_cube(rows: int, cols: int, bands: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """A seeded int16 reflectance cube (scale 1e-4, nodata -9999) and its valid mask (with a hole)."""
    rng = np.random.default_rng(seed)
    yy, xx = np.mgrid[0:rows, 0:cols]
    base = 2500 + 1500 * np.sin(xx / 7.0) * np.cos(yy / 9.0)
    cube = np.stack([base * (1 + 0.1 * b) + rng.normal(0, 400, (rows, cols)) for b in range(bands)])
    cube = np.clip(np.rint(cube), 0, 10000).astype(np.int16)
    valid = np.ones((rows, cols), bool)
    valid[rows // 3: rows // 3 + 5, cols // 4: cols // 4 + 7] = False  # a nodata hole across tiles
    valid[0, :3] = False
    cube[:, ~valid] = -9999
    return cube, valid


def make_source(path: Path, rows: int = ROWS, cols: int = COLS, bands: int = BANDS, seed: int = 7,
                shard: int = 16, grid: Grid | None = None) -> Path:
    """Write the seeded cube as a source store ``src`` (output ``refl``) at ``path`` (kept if present)."""
    path = Path(path)
    if (path / "zarr.json").is_file():
        return path
    cube, valid = make_cube(rows, cols, bands, seed)
    spec = OutputSpec(bands=tuple(f"b{i + 1:03d}" for i in range(bands)), dtype="int16", nodata=-9999,
                      coords={"wavelength": tuple(float(500 + 10 * i) for i in range(bands))},
                      attrs={"scale_factor": 1e-4})
    return write_source_store(path, {"refl": (cube, spec)}, grid or default_grid(rows, cols), valid=valid,
                              shard=shard)


# the fit step: per-band mean over the mosaic --------------------------------------------------------
def _mean_accumulate(block: Block) -> tuple[np.ndarray, np.ndarray]:
    x = block.data["x"][:, block.tile.crop[0], block.tile.crop[1]].astype(np.float64)
    ok = np.isfinite(x)
    return np.where(ok, x, 0.0).sum(axis=(1, 2)), ok.sum(axis=(1, 2)).astype(np.int64)


def _mean_merge(a: tuple, b: tuple) -> tuple:
    return a[0] + b[0], a[1] + b[1]


def _mean_finalize(acc: tuple, params: Any, meta: Any) -> dict:
    total, count = acc
    return {"mean": (total / np.maximum(count, 1)).astype(np.float64), "pixels": int(count.max())}


def _centre_kernel(block: Block, model: dict) -> dict:
    return {"output": block.data["x"] - model["mean"][:, None, None].astype(np.float32)}


def _same_as_input(meta: dict, model: Any, params: Any) -> dict:
    s = meta["x"].spec
    return {"output": OutputSpec(bands=s.bands, dtype="float32", nodata=float("nan"), coords=s.coords)}


# the class step: band 0 cut at two thresholds ------------------------------------------------------
def _classes_kernel(block: Block, model: Any) -> dict:
    lo, hi = block.params["thresholds"]
    b0 = block.data["x"][0]
    out = (1 + (b0 > lo).astype(np.uint8) + (b0 > hi).astype(np.uint8)).astype(np.uint8)
    return {"output": out[None]}


def build_steps(size: int = 5, modal_size: int = 5, scale: float = 2.0,
                thresholds: tuple[float, float] = THRESHOLDS) -> list[Step]:
    """The five steps of the test pipeline (see the module docstring)."""
    return [
        band_transform_step("scaled", "src/refl", scale=scale, offset=0.0),
        mean_filter_step("smooth", "scaled/output", size=size),
        Step(name="centred", kernel=_centre_kernel, outputs=_same_as_input, inputs={"x": "smooth/output"},
             fit=Fit(_mean_accumulate, _mean_merge, _mean_finalize)),
        Step(name="classes", kernel=_classes_kernel, inputs={"x": "centred/output"},
             params={"thresholds": list(thresholds)},
             outputs={"output": OutputSpec(bands=("class",), dtype="uint8", nodata=0, kind="categorical",
                                           class_names=CLASS_NAMES)}),
        modal_filter_step("cleaned", "classes/output", size=modal_size, n_classes=len(CLASS_NAMES)),
    ]


# steps for failure and merge-order tests ----------------------------------------------------------
#: Tiles at which ``failing_step`` raises in this process (tests set it; it is not part of the key).
FAIL_TILES: set[tuple[int, int]] = set()


def _failing_kernel(block: Block, model: Any) -> dict:
    index = block.tile.index
    if tuple(index) in FAIL_TILES or list(index) in [list(t) for t in block.params.get("fail", [])]:
        raise ValueError(f"deliberate failure at tile {index}")
    return {"output": block.data["x"][:1]}


def _first_band(meta: dict, model: Any, params: Any) -> dict:
    s = meta["x"].spec
    return {"output": OutputSpec(bands=s.bands[:1], dtype="float32", nodata=float("nan"))}


def failing_step(name: str, input_ref: str, fail: list[tuple[int, int]] | None = None) -> Step:
    """Copies band 0; raises on the tiles in ``fail`` (a parameter) or in :data:`FAIL_TILES`."""
    return Step(name=name, kernel=_failing_kernel, outputs=_first_band, inputs={"x": input_ref},
                params={"fail": [list(t) for t in fail or []]})


def _order_accumulate(block: Block) -> str:
    i, j = block.tile.index
    time.sleep(0.01 * ((5 * i + 3 * j) % 4))  # finish out of order
    return f"{i}.{j}"


def _order_merge(a: str, b: str) -> str:
    return f"({a} {b})"


def _order_finalize(acc: str, params: Any, meta: Any) -> dict:
    return {"tree": acc}


def merge_order_step(name: str, input_ref: str) -> Step:
    """A fit whose model is the shape of its merge tree, e.g. ``((0.0 0.1) 1.0)``; copies band 0."""
    return Step(name=name, kernel=_failing_kernel, outputs=_first_band, inputs={"x": input_ref},
                fit=Fit(_order_accumulate, _order_merge, _order_finalize))


class SlowLocalExecutor(LocalExecutor):
    """The in-process loop, sleeping ``sleep`` s per task: half before it, half before its record."""

    def __init__(self, sleep: float):
        super().__init__()
        self.sleep = sleep

    def map(self, fn, items, on_done, on_error) -> None:
        half = self.sleep / 2

        def slow_fn(item):
            time.sleep(half)
            return fn(item)

        def slow_done(item, res):
            time.sleep(half)
            on_done(item, res)

        super().map(slow_fn, items, slow_done, on_error)


def run_pipeline(run_dir: Path, executor=None, *, tile: int = 16, size: int = 5, modal_size: int = 5,
                 scale: float = 2.0, export: bool = True, seed: int = 7, steps: list[Step] | None = None,
                 src: Path | None = None) -> RunResult:
    """Make the source (if needed) and run the pipeline in ``run_dir``."""
    run_dir = Path(run_dir)
    src = make_source(src or run_dir.with_name(run_dir.name + "-src.zarr"), seed=seed, shard=tile)
    steps = steps if steps is not None else build_steps(size=size, modal_size=modal_size, scale=scale)
    opts = RunOptions(tile=tile, export=export, config_hash=CONFIG_HASH)
    with Run(run_dir, opts) as run:
        return run.execute(steps, executor or LocalExecutor(), sources={"src": src})


def summary(result: RunResult) -> dict:
    return {"ok": result.ok, "messages": result.messages, "stopped_at": result.stopped_at,
            "steps": [{"name": s.name, "key": s.key, "total": s.total, "done_before": s.done_before,
                       "computed": s.computed, "failed": {f"{i},{j}": e for (i, j), e in s.failed.items()},
                       "invalidated": s.invalidated, "fit": s.fit, "products": s.products}
                      for s in result.steps]}


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("run_dir", type=Path)
    p.add_argument("--executor", choices=("local", "dask"), default="local")
    p.add_argument("--address", default=None, help="existing scheduler (with --executor dask)")
    p.add_argument("--workers", type=int, default=2)
    p.add_argument("--sleep", type=float, default=0.0, help="seconds per tile (local executor)")
    p.add_argument("--tile", type=int, default=16)
    p.add_argument("--size", type=int, default=5)
    p.add_argument("--seed", type=int, default=7)
    p.add_argument("--no-export", action="store_true")
    a = p.parse_args(argv)
    if a.executor == "local":
        ex = SlowLocalExecutor(a.sleep) if a.sleep > 0 else LocalExecutor()
    elif a.address:
        ex = make_executor("dask", address=a.address)
    else:
        ex = make_executor("dask", n_workers=a.workers, threads_per_worker=1)
    try:
        result = run_pipeline(a.run_dir, ex, tile=a.tile, size=a.size, export=not a.no_export, seed=a.seed)
    finally:
        ex.close()
    print(json.dumps(summary(result)), flush=True)
    return 0 if result.ok else 1


if __name__ == "__main__":
    # run the importable module, not __main__: the kernels' names (part of the step keys) and their
    # pickles must be those of the module ``engine_script``
    sys.path.insert(0, str(Path(__file__).resolve().parent))
    import engine_script

    sys.exit(engine_script.main())
