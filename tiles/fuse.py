"""Fused passes: steps that read the same input tile run in one task per tile.

A fused task reads the tile once (with the largest halo of its members), then runs each member's
kernel on its own copy of the member's window, one member after another, and writes each member's
store. Everything else stays per step: keys, fits, invalidation, the ledger (each member's tile is
recorded on its own), resume and export. The engine decides the groups in :meth:`Run.execute`;
the planner (:mod:`swathmill.tiles.plan`) uses the same rules to count passes.

Memory: members run one after another inside the task, so a fused task holds the shared block plus
the largest member's working set (its copy of the block, its temporaries and its outputs), not the
sum of the members'. :func:`task_memory` is the engine's per-step estimate of that working set, from
the declared inputs and outputs; :func:`split_by_memory` keeps a group under a per-task limit.
"""
from __future__ import annotations

import time
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any, Iterable, Mapping, Sequence

import numpy as np

from .grid import Window
from .step import Block, InputMeta, OutputSpec, Step
from .store import decode
from .tasks import TileError, TileTask, Written, _store, compute_tile, ride

__all__ = ["FusedTask", "RIDERS", "run_fused", "fusable", "fusion_groups", "task_memory", "shared_memory", "split_by_memory",
           "KERNEL_WORK_FACTOR"]

# Temporaries of a kernel, in multiples of its decoded float32 input block (a documented guess the
# planner's --probe replaces by a measured peak): spectral kernels hold a few float32/float64 arrays
# the size of the block while they work (normalised copies, products with the library).
KERNEL_WORK_FACTOR = 2.0


@dataclass(frozen=True)
class FusedTask:
    """One tile of a fused pass: the member tasks (one per step whose tile is pending), read once."""

    members: tuple[TileTask, ...]
    riders: tuple = ()  # fits of later steps reading the shared input and members' outputs (tiles/fitpass.py)

    @property
    def index(self) -> tuple[int, int]:
        return self.members[0].index

    @property
    def label(self) -> str:
        return f"fused-{'+'.join(m.step.name for m in self.members)}-{self.index[0]}-{self.index[1]}"


@dataclass
class _Shared:
    """The stored values of every input over the group's widest window, and each input's valid mask."""

    outer: Window
    raw: dict[str, np.ndarray]  # ref -> stored values (bands, rows, cols)
    valid: dict[str, np.ndarray]  # ref -> (rows, cols) bool
    meta: dict[str, InputMeta]  # ref -> InputMeta


def _read_shared(task: TileTask) -> _Shared:
    """Read each input of ``task`` once, as stored (decoding is per member: steps differ in ``decode``)."""
    tile = task.tile
    raw, valid, meta = {}, {}, {}
    for _alias, (path, output) in task.inputs.items():
        store = _store(path)
        spec = store.specs[output]
        ref = f"{Path(path).stem}/{output}"
        meta[ref] = InputMeta(ref, store.grid, spec)
        raw[ref] = store.read(output, tile.padded)
        valid[ref] = store.read_valid(tile.padded)
    return _Shared(tile.padded, raw, valid, meta)


def _member_block(shared: _Shared, task: TileTask) -> Block:
    """The member's own block, made from the shared read exactly as :func:`read_block` makes it from the
    store: its padded window cut out, decoded (or not) as the step asks, NaN where any input is invalid.
    Each member gets its own arrays (kernels may write into their inputs)."""
    tile, step = task.tile, task.step
    cut = tile.padded.relative_to(shared.outer)
    valid = np.ones(tile.padded.shape, dtype=bool)
    data, meta = {}, {}
    for alias, (path, output) in task.inputs.items():
        ref = f"{Path(path).stem}/{output}"
        m = shared.meta[ref]
        meta[alias] = m
        raw = np.array(shared.raw[ref][:, cut[0], cut[1]], copy=True, order="C")
        valid &= shared.valid[ref][cut]
        data[alias] = decode(raw, m.spec) if step.decode else raw
    if step.decode:
        for arr in data.values():
            arr[:, ~valid] = np.nan
    return Block(data=data, valid=valid, tile=tile, grid=task.grid.window(tile.padded), params=step.params,
                 static=step.static, meta=meta, decoded=step.decode)


def run_fused(task: FusedTask) -> dict[str, dict]:
    """Read the tile once, run every member's kernel and write its store.

    Returns, per member step name, ``{"seconds", "valid", "read_seconds"}`` or ``{"error": message}``: a
    failing member does not stop the others (each is recorded in the ledger on its own). A failed read
    fails the task.
    """
    t0 = time.perf_counter()
    first = task.members[0]
    halo = max(m.halo for m in task.members)
    reader = replace(first, halo=halo)
    try:
        shared = _read_shared(reader)
    except Exception as exc:
        names = ", ".join(m.step.name for m in task.members)
        raise TileError(f"fused steps {names}, {reader.tile.name}: reading the shared input failed: "
                        f"{type(exc).__name__}: {exc}") from exc
    read_s = time.perf_counter() - t0
    out: dict[str, dict] = {}
    written = _shared_written(reader, shared) if task.riders else None
    for m in task.members:
        t1 = time.perf_counter()
        try:
            res = compute_tile(m, _member_block(shared, m), t1, keep=written)
            res["read_seconds"] = read_s / len(task.members)
            out[m.step.name] = res
        except Exception as exc:  # noqa: BLE001 - reported per member, the others go on
            msg = str(exc) or type(exc).__name__
            if not msg.startswith("step "):
                msg = f"step {m.step.name!r}, {m.tile.name}: {type(exc).__name__}: {msg}"
            out[m.step.name] = {"error": msg}
    if task.riders:
        out[RIDERS] = ride(task.riders, written)
    return out


#: the key of :func:`run_fused`'s result that holds the fused task's riders (not a step name: has a space)
RIDERS = "riders of the pass"


def _shared_written(reader: TileTask, shared: _Shared) -> Written:
    """The shared read, cut to the tile's core, in the form riders take (store, arrays, valid)."""
    cut = reader.tile.core.relative_to(shared.outer)
    out: Written = {}
    for _alias, (path, output) in reader.inputs.items():
        ref = f"{Path(path).stem}/{output}"
        store, arrays, valid = out.get(path, (_store(path), {}, shared.valid[ref][cut]))
        out[path] = (store, {**arrays, output: shared.raw[ref][:, cut[0], cut[1]]}, valid)
    return out


def _refs(step: Step) -> list[str]:
    return sorted(step.inputs.values())


def fusable(a: Step, b: Step) -> bool:
    """Whether ``b`` can share ``a``'s read: both read stores, the same input references (aliases may
    differ), each reference once."""
    ra, rb = _refs(a), _refs(b)
    return (a.reader is None and b.reader is None and ra == rb and len(set(ra)) == len(ra))


def fusion_groups(steps: Sequence[Step]) -> list[list[Step]]:
    """The steps in groups that read the same input, in the order the first member of each group comes.

    A later step joins the group of the first step it can share a read with; since it reads only what
    that step reads, moving it forward never makes it run before one of its inputs.
    """
    groups: list[list[Step]] = []
    for s in steps:
        for g in groups:
            if fusable(g[0], s):
                g.append(s)
                break
        else:
            groups.append([s])
    return groups


def task_memory(padded: tuple[int, int], inputs: Iterable[OutputSpec], outputs: Iterable[OutputSpec],
                core: tuple[int, int] | None = None, decode: bool = True) -> int:
    """Bytes a tile task of a step holds at its peak (an estimate from the declared specs).

    The stored input block, its decoded float32 copy, :data:`KERNEL_WORK_FACTOR` times that for the
    kernel's temporaries, and the outputs as float64 plus their encoded copies.
    """
    px = padded[0] * padded[1]
    cpx = px if core is None else core[0] * core[1]
    stored = sum(len(s.bands) * np.dtype(s.dtype).itemsize for s in inputs)
    nin = sum(len(s.bands) for s in inputs)
    dec = nin * 4 if decode else stored
    nout = sum(len(s.bands) for s in outputs)
    enc = sum(len(s.bands) * np.dtype(s.dtype).itemsize for s in outputs)
    return int(px * (stored + dec * (1 + KERNEL_WORK_FACTOR) + 2) + cpx * (nout * 8 + enc + 1))


def shared_memory(padded: tuple[int, int], inputs: Iterable[OutputSpec]) -> int:
    """Bytes of a fused task's shared read: the stored values of every input and their valid masks."""
    return int(padded[0] * padded[1] * (sum(len(s.bands) * np.dtype(s.dtype).itemsize for s in inputs) + 1))


def split_by_memory(members: Sequence[Any], memory: Mapping[Any, int], shared: int,
                    limit: int | None) -> list[list[Any]]:
    """Cut a fused group so each part fits ``limit`` bytes per task.

    A part holds the shared block (``shared`` bytes) plus the largest member's working set
    (``memory[m]``). Members that would push a part over the limit go to a part of their own (run
    unfused, as they would be without fusion). ``limit=None`` keeps the group whole.
    """
    if limit is None or len(members) < 2:
        return [list(members)]
    fits = [m for m in members if shared + memory[m] <= limit]
    alone = [[m] for m in members if shared + memory[m] > limit]
    parts = ([fits] if fits else []) + alone
    return sorted(parts, key=lambda p: list(members).index(p[0]))
