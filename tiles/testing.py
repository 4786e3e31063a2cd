"""Helpers for tests: run steps through the real engine on numpy arrays.

``run_on_arrays`` writes each input array to a store (a "source" the steps can read as
``"src/<name>"``), runs the steps in a run directory under ``tmp_path`` with the chosen tile size and
executor, and returns every output of every step as numpy arrays (decoded: float, NaN at nodata, unless
``raw=True``). It is the shortest way to prove "tiled equals untiled" for a step.
"""
from __future__ import annotations

from pathlib import Path
from typing import Mapping, Sequence

import numpy as np
from affine import Affine

from .executors import Executor, make_executor
from .grid import Grid
from .run import Run, RunOptions, RunResult
from .step import OutputSpec, Step
from .store import StoreLayout, create_store, decode, open_store

__all__ = ["run_on_arrays", "default_grid", "write_source_store", "read_output"]


def default_grid(rows: int, cols: int, res: float = 10.0, crs: str = "EPSG:32633") -> Grid:
    return Grid(rows, cols, Affine(res, 0, 400000.0, 0, -res, 5000000.0), crs)


def write_source_store(path: Path, arrays: Mapping[str, tuple[np.ndarray, OutputSpec]], grid: Grid,
                       valid: np.ndarray | None = None, shard: int = 64, chunk: int | None = None) -> Path:
    """Write arrays (bands, rows, cols) with their specs into one store."""
    store = create_store(path, grid, {k: s for k, (_a, s) in arrays.items()},
                         StoreLayout(shard=shard, chunk=chunk or shard))
    full = grid.full
    for name, (arr, _spec) in arrays.items():
        a = arr if arr.ndim == 3 else arr[None]
        store.write(name, full, a.astype(_spec.dtype))
    store.write_valid(full, np.ones(grid.shape, bool) if valid is None else valid)
    return path


def read_output(run_dir: Path, ref: str, raw: bool = False) -> np.ndarray:
    name, output = ref.split("/")
    store = open_store(Path(run_dir) / "stores" / f"{name}.zarr")
    arr = store.read(output, store.grid.full)
    return arr if raw else decode(arr, store.specs[output])


def run_on_arrays(steps: Sequence[Step], arrays: Mapping[str, np.ndarray | tuple[np.ndarray, OutputSpec]],
                  tmp_path: Path, *, tile: int = 32, executor: str | Executor = "local",
                  valid: np.ndarray | None = None, grid: Grid | None = None, raw: bool = False,
                  export: bool = False, run_name: str = "run", options: RunOptions | None = None,
                  ) -> tuple[dict[str, np.ndarray], RunResult]:
    """Run ``steps`` through the engine on in-memory inputs.

    arrays: name -> array (bands, rows, cols) (float32 spec made for it) or (array, OutputSpec).
    Returns ({"step/output": array}, RunResult). Steps refer to inputs as ``"src/<name>"``.
    """
    tmp_path = Path(tmp_path)
    specs = {}
    for name, a in arrays.items():
        if isinstance(a, tuple):
            specs[name] = a
        else:
            a = np.asarray(a)
            a3 = a if a.ndim == 3 else a[None]
            specs[name] = (a3, OutputSpec(bands=tuple(f"b{i + 1:03d}" for i in range(a3.shape[0])),
                                          dtype=str(a3.dtype) if a3.dtype.kind == "f" else str(a3.dtype),
                                          nodata=np.nan if a3.dtype.kind == "f" else 0))
    first = next(iter(specs.values()))[0]
    g = grid or default_grid(first.shape[-2], first.shape[-1])
    src = write_source_store(tmp_path / f"{run_name}-src.zarr", specs, g, valid, shard=tile)
    ex = make_executor(executor) if isinstance(executor, str) else executor
    opts = options or RunOptions(tile=tile, chunk=tile, export=export)
    try:
        with Run(tmp_path / run_name, opts) as run:
            result = run.execute(steps, ex, sources={"src": src})
    finally:
        if isinstance(executor, str):
            ex.close()
    out = {}
    for step in steps:
        p = tmp_path / run_name / "stores" / f"{step.name}.zarr"
        if (p / "zarr.json").is_file():
            store = open_store(p)
            for o in store.specs:
                out[f"{step.name}/{o}"] = read_output(tmp_path / run_name, f"{step.name}/{o}", raw=raw)
    return out, result



