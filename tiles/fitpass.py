"""Fits that do not read the cube again: shared fit passes and fits that ride on the pass making their input.

A step's fit accumulates over tiles of its input and merges the results in a fixed pairwise tree
(:func:`swathmill.tiles.executors.merge_tree`). Two ways to save reads, both byte-identical to fitting
each step on its own (each fit sees the same blocks and merges them in the same tree):

- **Shared fit pass.** Steps of a fused group (same input) whose models are missing accumulate in one
  pass: a :class:`FusedFit` task reads the tile once with the widest fit halo and runs every member's
  ``accumulate`` on its own copy of its window (made as :func:`~swathmill.tiles.fuse.run_fused` makes
  kernel blocks).
- **Riders.** A later step whose fit (with a halo of 0) reads only outputs of a step computing tiles
  now accumulates inside that step's tile tasks, from the encoded values just written: exactly what
  reading the tile back would return. In a fused pass, a fit may also read the pass's shared input and
  the outputs of several members (e.g. SVM samples of the components and the reflectance): it runs
  once every member has written the tile. Tiles no task carries (already finished on a resumed run)
  are read as usual.

Leaves arrive in any order; :class:`PairTree` merges them in the fixed tree as they come, holding
only nodes whose sibling is not ready yet.
"""
from __future__ import annotations

import time
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any, Callable

from .tasks import Rider, TileError, TileTask

__all__ = ["PairTree", "FusedFit", "RidePlan", "RidingFits", "run_fused_fit"]


class PairTree:
    """Merge leaves ``0..n-1`` with ``merge`` in the pairwise tree of ``merge_tree``, whatever order they come in.

    Pairs are fixed by the leaves' positions (``(0, 1), (2, 3), ...``; a lone last node moves up
    unchanged), so floating-point merges give the same bits as the in-order reduction.
    """

    def __init__(self, n: int, merge: Callable[[Any, Any], Any]):
        self.n, self.merge = n, merge
        self.sizes = [n]
        while self.sizes[-1] > 1:
            self.sizes.append((self.sizes[-1] + 1) // 2)
        self.top = len(self.sizes) - 1
        self._waiting: dict[tuple[int, int], Any] = {}
        self._seen: set[int] = set()
        self.result: Any = None

    @property
    def complete(self) -> bool:
        return self.n > 0 and len(self._seen) == self.n

    def push(self, k: int, value: Any) -> None:
        if not 0 <= k < self.n or k in self._seen:
            raise ValueError(f"leaf {k} is outside 0..{self.n - 1} or was pushed twice")
        self._seen.add(k)
        level = 0
        while True:
            while level < self.top and (k ^ 1) >= self.sizes[level]:
                level, k = level + 1, k // 2
            if level == self.top:
                self.result = value
                return
            sib = self._waiting.pop((level, k ^ 1), None)
            if sib is None:
                self._waiting[(level, k)] = value
                return
            a, b = (value, sib) if k % 2 == 0 else (sib, value)
            value = self.merge(a, b)
            level, k = level + 1, k // 2


@dataclass(frozen=True)
class FusedFit:
    """One tile of a shared fit pass: the fit tasks (``slot`` -> task) of steps that read the same input."""

    members: tuple[tuple[str, TileTask], ...]

    @property
    def index(self) -> tuple[int, int]:
        return self.members[0][1].index

    @property
    def label(self) -> str:
        return f"fit-{'+'.join(s for s, _ in self.members)}-{self.index[0]}-{self.index[1]}"


def run_fused_fit(task: FusedFit) -> dict[str, tuple[Any, float]]:
    """Read the tile once; return, per slot, the member's accumulated value and its seconds."""
    from .fuse import _member_block, _read_shared

    first = task.members[0][1]
    reader = replace(first, halo=max(t.halo for _s, t in task.members))
    try:
        shared = _read_shared(reader)
    except Exception as exc:
        raise TileError(f"fit of steps {', '.join(s for s, _ in task.members)}, {reader.tile.name}: reading the "
                        f"shared input failed: {type(exc).__name__}: {exc}") from exc
    out = {}
    for slot, t in task.members:
        t0 = time.perf_counter()
        try:
            out[slot] = (t.step.fit.accumulate(_member_block(shared, t)), time.perf_counter() - t0)
        except Exception as exc:
            raise TileError(f"step {t.step.name!r}, fit on {t.tile.name}: {type(exc).__name__}: {exc}") from exc
    return out


@dataclass
class RidePlan:
    """A later step's fit riding on the pass of the steps in ``needs`` (and on the pass's shared read when
    ``shared``): its fit tiles, their merge tree, what arrived."""

    step: Any  # Step
    sp: Any  # the step's plan (inputs, meta, grid) as the run made it
    mbase: Path  # where its model goes (the same base its own turn looks for)
    tiles: list
    needs: frozenset  # names of the carrying steps whose outputs it reads
    shared: bool  # it also reads the fused pass's shared input
    tree: PairTree
    pos: dict
    carried: set
    seconds: float = 0.0
    error: str | None = None

    @property
    def carrier(self) -> str:
        return ", ".join(sorted(self.needs))


class RidingFits:
    """The fits riding on one pass: riders per tile, leaves as tiles finish, the rest read at the end."""

    def __init__(self, plans: list[RidePlan], tile_size: int):
        self.plans, self.tile_size = plans, tile_size
        self._by_slot = {p.step.name: p for p in plans}

    def __bool__(self) -> bool:
        return bool(self.plans)

    def _rider(self, p: RidePlan, index: tuple[int, int]) -> Rider:
        p.carried.add(index)
        return Rider(p.step.name, TileTask(p.step, index, p.sp.grid, self.tile_size, 0, p.sp.inputs))

    def riders(self, carrier: str, index: tuple[int, int]) -> tuple[Rider, ...]:
        """Riders of one step's tile task: fits reading only that step's outputs."""
        return tuple(self._rider(p, index) for p in self.plans
                     if not p.shared and p.needs == {carrier} and index in p.pos)

    def group_riders(self, pending: set[str], index: tuple[int, int]) -> tuple[Rider, ...]:
        """Riders of a fused task whose members ``pending`` compute this tile: fits reading the shared
        input or the outputs of several members."""
        return tuple(self._rider(p, index) for p in self.plans
                     if (p.shared or len(p.needs) > 1) and p.needs <= pending and index in p.pos)

    def take(self, index: tuple[int, int], riders: dict | None) -> None:
        """Push the riders' values of a finished tile task (``{slot: {"value", "seconds"} or {"error"}}``)."""
        for slot, r in (riders or {}).items():
            p = self._by_slot[slot]
            if "error" in r:
                p.error = p.error or f"{index}: {r['error']}"
            elif p.error is None:
                p.tree.push(p.pos[index], r["value"])
                p.seconds += r["seconds"]

    def finish(self, executor, complete: set[str]) -> list[tuple[RidePlan, dict, int]]:
        """Read the fit tiles no task carried, then finalize: ``(plan, model, tiles read)`` per fit that
        completed. A fit that failed, or whose carriers did not all finish, is left to its own turn."""
        from .tasks import run_accumulate

        done = []
        for p in self.plans:
            if p.error is not None or not p.needs <= complete:
                continue
            rest = [TileTask(p.step, t.index, p.sp.grid, self.tile_size, 0, p.sp.inputs)
                    for t in p.tiles if t.index not in p.carried]
            errors: list[str] = []
            executor.map(run_accumulate, rest, lambda task, acc, p=p: p.tree.push(p.pos[task.index], acc),
                         lambda task, exc, tb: errors.append(str(exc)))
            if errors or not p.tree.complete:
                p.error = errors[0] if errors else "missing tiles"
                continue
            try:
                model = p.step.fit.finalize(p.tree.result, p.step.params, p.sp.meta)
            except Exception as exc:  # noqa: BLE001 - its own turn fits again and reports the error there
                p.error = f"{type(exc).__name__}: {exc}"
                continue
            done.append((p, model, len(rest)))
        return done
