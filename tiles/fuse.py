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
from typing import Any, Iterable, Mapping, Sequence

import numpy as np

from .step import Block, OutputSpec, Step
from .tasks import TileError, TileTask, compute_tile, read_block

__all__ = ["FusedTask", "run_fused", "fusable", "fusion_groups", "task_memory", "split_by_memory",
           "KERNEL_WORK_FACTOR"]

# Temporaries of a kernel, in multiples of its decoded float32 input block (a documented guess the
# planner's --probe replaces by a measured peak): spectral kernels hold a few float32/float64 arrays
# the size of the block while they work (normalised copies, products with the library).
KERNEL_WORK_FACTOR = 2.0


@dataclass(frozen=True)
class FusedTask:
    """One tile of a fused pass: the member tasks (one per step whose tile is pending), read once."""

    members: tuple[TileTask, ...]

    @property
    def index(self) -> tuple[int, int]:
        return self.members[0].index

    @property
    def label(self) -> str:
        return f"fused-{'+'.join(m.step.name for m in self.members)}-{self.index[0]}-{self.index[1]}"


def _member_block(shared: Block, outer, task: TileTask) -> Block:
    """The member's own block: its padded window cut out of the shared read, copied (kernels may write
    into their inputs, and a contiguous copy gives the kernel exactly the arrays an unfused read gives)."""
    tile = task.tile
    cut = tile.padded.relative_to(outer)
    data = {k: np.array(v[:, cut[0], cut[1]], copy=True, order="C") for k, v in shared.data.items()}
    valid = np.array(shared.valid[cut], copy=True, order="C")
    return Block(data=data, valid=valid, tile=tile, grid=task.grid.window(tile.padded), params=task.step.params,
                 static=task.step.static, meta=dict(shared.meta), decoded=shared.decoded)


def run_fused(task: FusedTask) -> dict[str, dict]:
    """Read the tile once, run every member's kernel and write its store.

    Returns, per member step name, ``{"seconds", "valid"}`` or ``{"error": message}``: a failing member
    does not stop the others (each is recorded in the ledger on its own). A failed read fails the task.
    """
    t0 = time.perf_counter()
    first = task.members[0]
    halo = max(m.halo for m in task.members)
    reader = replace(first, halo=halo)
    try:
        shared = read_block(reader)
    except Exception as exc:
        names = ", ".join(m.step.name for m in task.members)
        raise TileError(f"fused steps {names}, {reader.tile.name}: reading the shared input failed: "
                        f"{type(exc).__name__}: {exc}") from exc
    read_s = time.perf_counter() - t0
    outer = reader.tile.padded
    out: dict[str, dict] = {}
    for m in task.members:
        t1 = time.perf_counter()
        try:
            res = compute_tile(m, _member_block(shared, outer, m), t1)
            res["read_seconds"] = read_s / len(task.members)
            out[m.step.name] = res
        except Exception as exc:  # noqa: BLE001 - reported per member, the others go on
            out[m.step.name] = {"error": str(exc) or type(exc).__name__}
    return out


def fusable(a: Step, b: Step) -> bool:
    """Whether ``b`` can share ``a``'s read: the same input references, both store-reading, same decoding."""
    return (a.reader is None and b.reader is None and a.decode == b.decode
            and sorted(a.inputs.items()) == sorted(b.inputs.items()))


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
