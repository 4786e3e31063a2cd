"""Task functions that run on workers: read a tile's windows, call the step, write the core.

Everything here is picklable and imports nothing of the science: a task carries its Step declaration
(module-level functions) and the paths of the stores it reads and writes.
"""
from __future__ import annotations

import json
import time
from dataclasses import dataclass, field
from functools import lru_cache
from pathlib import Path
from typing import Any, Mapping

import numpy as np

from .grid import Grid, Tile, Tiling
from .step import Block, InputMeta, OutputSpec, Step
from .store import TileStore, decode, encode
from ..errors import SwathmillError

__all__ = ["TileTask", "Rider", "Written", "ride", "run_tile", "compute_tile", "read_block", "run_accumulate", "load_model", "save_model", "TileError"]


class TileError(SwathmillError, RuntimeError):
    """A tile failed; the message names the step and the tile."""


@dataclass(frozen=True)
class TileTask:
    step: Step
    index: tuple[int, int]
    grid: Grid
    tile_size: int
    halo: int
    inputs: dict[str, tuple[str, str]] = field(default_factory=dict)  # alias -> (store path, output)
    out_path: str | None = None
    out_specs: dict[str, OutputSpec] = field(default_factory=dict)
    model_path: str | None = None
    riders: tuple = ()  # fits of later steps that accumulate on the tile just written (tiles/fitpass.py)

    @property
    def tile(self) -> Tile:
        return Tiling(self.grid, self.tile_size, self.halo)[self.index]

    @property
    def label(self) -> str:
        return f"{self.step.name}-{self.index[0]}-{self.index[1]}"


def _store(path: str) -> TileStore:
    """The opened store at ``path``, cached per process while its ``zarr.json`` is unchanged.

    A store recreated at the same path (an invalidated step) has a new ``zarr.json`` (its attributes
    hold the step key); keying the cache on its content keeps a process from writing or decoding
    with a stale layout or output description.
    """
    return _store_cached(path, (Path(path) / "zarr.json").read_bytes())


@lru_cache(maxsize=32)
def _store_cached(path: str, _meta: bytes) -> TileStore:
    return TileStore(Path(path))


def save_model(model: dict, base: Path) -> str:
    """Save a model as ``base.json`` (JSON values) and ``base.npz`` (arrays); return their hash."""
    import hashlib
    import os

    arrays = {k: np.asarray(v) for k, v in model.items() if isinstance(v, np.ndarray)}
    plain = {k: v for k, v in model.items() if not isinstance(v, np.ndarray)}
    base.parent.mkdir(parents=True, exist_ok=True)
    tmp_npz = base.with_name(base.name + ".tmp.npz")
    tmp_json = base.with_name(base.name + ".tmp.json")
    np.savez(tmp_npz, **arrays)
    from .step import canonical_json
    tmp_json.write_text(canonical_json(plain))
    h = hashlib.sha256(tmp_json.read_bytes() + tmp_npz.read_bytes()).hexdigest()
    os.replace(tmp_npz, base.with_suffix(".npz"))
    os.replace(tmp_json, base.with_suffix(".json"))
    return h[:16]


def load_model(base: str | Path | None) -> dict | None:
    if base is None:
        return None
    return _load_model_cached(str(base))


@lru_cache(maxsize=8)
def _load_model_cached(base: str) -> dict:
    b = Path(base)
    model = json.loads(b.with_suffix(".json").read_text())
    with np.load(b.with_suffix(".npz"), allow_pickle=False) as z:
        model.update({k: z[k] for k in z.files})
    return model


def read_block(task: TileTask) -> Block:
    step, tile = task.step, task.tile
    sub = task.grid.window(tile.padded)
    meta: dict[str, InputMeta] = {}
    if step.reader is not None:
        data, valid = step.reader(sub, tile, step.params, step.static)
        valid = np.asarray(valid, dtype=bool)
    else:
        data = {}
        valid = np.ones(tile.padded.shape, dtype=bool)
        for alias, (path, output) in task.inputs.items():
            store = _store(path)
            spec = store.specs[output]
            meta[alias] = InputMeta(f"{Path(path).stem}/{output}", store.grid, spec)
            raw = store.read(output, tile.padded)
            v = store.read_valid(tile.padded)
            valid &= v
            data[alias] = decode(raw, spec) if step.decode else raw
        if step.decode:
            for arr in data.values():
                arr[:, ~valid] = np.nan
    return Block(data=data, valid=valid, tile=tile, grid=sub, params=step.params, static=step.static, meta=meta,
                 decoded=step.decode or step.reader is not None)


def run_accumulate(task: TileTask) -> Any:
    try:
        block = read_block(task)
        return task.step.fit.accumulate(block)
    except Exception as exc:
        raise TileError(f"step {task.step.name!r}, fit on {task.tile.name}: {type(exc).__name__}: {exc}") from exc


def run_tile(task: TileTask) -> dict:
    """Compute one tile and write its core region. Returns small statistics."""
    t0 = time.perf_counter()
    try:
        block = read_block(task)
    except Exception as exc:
        raise TileError(f"step {task.step.name!r}, {task.tile.name}: {type(exc).__name__}: {exc}") from exc
    return compute_tile(task, block, t0)


def compute_tile(task: TileTask, block: Block, t0: float | None = None, keep: dict | None = None) -> dict:
    """Run the step's kernel on ``block`` (read for ``task``) and write the tile's core region.

    Returns ``{"seconds": ..., "valid": ...}``; ``seconds`` counts from ``t0`` (default: now). ``keep``
    (a dict) receives what was written, ``{out_path: (store, arrays, valid)}``, for riders of a fused task.
    """
    t0 = time.perf_counter() if t0 is None else t0
    step, tile = task.step, task.tile
    try:
        model = load_model(task.model_path)
        out = dict(step.kernel(block, model))
        valid = out.pop("valid", None)
        valid = block.valid if valid is None else np.asarray(valid, dtype=bool)
        valid = _to_core(valid, tile, "valid", step)
        store = _store(task.out_path)
        missing = set(task.out_specs) - set(out)
        if missing:
            raise TileError(f"kernel returned no array for output(s) {sorted(missing)}")
        arrays = {}
        for name, spec in task.out_specs.items():
            arr = _to_core(np.asarray(out[name]), tile, name, step)
            if arr.ndim == 2:
                arr = arr[None]
            if arr.shape[0] != len(spec.bands):
                raise TileError(f"output {name!r} has {arr.shape[0]} bands; its description names "
                                f"{len(spec.bands)}")
            arrays[name] = encode(arr, spec, valid, physical=step.decode)
        store.clear(tile.core)
        for name, arr in arrays.items():
            store.write(name, tile.core, arr)
        store.write_valid(tile.core, valid)
    except TileError as exc:
        raise TileError(f"step {step.name!r}, {tile.name}: {exc}") from exc
    except Exception as exc:
        raise TileError(f"step {step.name!r}, {tile.name}: {type(exc).__name__}: {exc}") from exc
    res = {"seconds": time.perf_counter() - t0, "valid": int(valid.sum())}
    if task.riders:
        res["riders"] = ride(task.riders, {task.out_path: (store, arrays, valid)})
    if keep is not None:
        keep[task.out_path] = (store, arrays, valid)
    return res


@dataclass(frozen=True)
class Rider:
    """A later step's fit task carried by a tile task of the step that makes its input."""

    slot: str
    task: "TileTask"  # the fit task (halo 0; it reads only what the carrying task has in memory)


#: what a tile task has in memory, per store path: (the store, encoded arrays per output, valid mask)
Written = dict[str, tuple[TileStore, Mapping[str, np.ndarray], np.ndarray]]


def _block_from_written(task: TileTask, written: Written) -> Block:
    """The block :func:`read_block` would read for ``task`` right after the values in ``written``
    (per store path: encoded arrays of the tile's core, and the valid mask) were stored."""
    step, tile = task.step, task.tile
    if tile.padded != tile.core:
        raise ValueError(f"step {step.name!r}: a riding fit needs a halo of 0")
    data, meta = {}, {}
    v = np.ones(tile.core.shape, dtype=bool)
    for alias, (path, output) in task.inputs.items():
        store, arrays, valid = written[path]
        spec: OutputSpec = store.specs[output]
        meta[alias] = InputMeta(f"{Path(path).stem}/{output}", store.grid, spec)
        raw = np.array(arrays[output], copy=True, order="C")
        v &= valid
        data[alias] = decode(raw, spec) if step.decode else raw
    if step.decode:
        for arr in data.values():
            arr[:, ~v] = np.nan
    return Block(data=data, valid=v, tile=tile, grid=task.grid.window(tile.padded), params=step.params,
                 static=step.static, meta=meta, decoded=step.decode)


def ride(riders: tuple[Rider, ...], written: Written) -> dict[str, dict]:
    """Run each rider's accumulate on what the tile task has in memory: per slot ``{"value", "seconds"}``
    or ``{"error"}`` (a failing rider never fails the task that carries it; its step fits on its own)."""
    out: dict[str, dict] = {}
    for r in riders:
        t0 = time.perf_counter()
        try:
            value = r.task.step.fit.accumulate(_block_from_written(r.task, written))
            out[r.slot] = {"value": value, "seconds": time.perf_counter() - t0}
        except Exception as exc:  # noqa: BLE001 - reported; the step then fits by reading
            out[r.slot] = {"error": f"{type(exc).__name__}: {exc}"}
    return out


def _to_core(arr: np.ndarray, tile: Tile, name: str, step: Step) -> np.ndarray:
    shp = arr.shape[-2:]
    if shp == tile.padded.shape:
        return arr[..., tile.crop[0], tile.crop[1]]
    if shp == tile.core.shape:
        return arr
    raise TileError(f"kernel output {name!r} has rows x cols {shp}; expected the padded window "
                    f"{tile.padded.shape} or the core {tile.core.shape}")
