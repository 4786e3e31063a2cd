"""A run: one directory, a list of steps, an executor. Plans, fits, computes tiles, resumes, exports.

Layout of a run directory::

    config.yaml     the frozen configuration of the latest invocation (written by the caller)
    run.lock        held while a process works on the run
    ledger.sqlite   finished tiles per step key, products, timings, history
    models/         fitted models: <step>-<fitkey>.json + .npz
    stores/         one Zarr v3 store per step
    products/       Cloud-Optimized GeoTIFFs and their STAC items
    logs/           one log per invocation
"""
from __future__ import annotations

import hashlib
import logging
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Mapping, Protocol, Sequence

from .. import __version__
from .executors import Executor, LocalExecutor
from .grid import Grid, Tiling
from .ledger import Ledger, describe_changes
from .lock import RunLock
from .step import InputMeta, OutputSpec, Step, canonical_json, params_dump
from .store import StoreLayout, TileStore, create_store
from .fitpass import FusedFit, PairTree, RidePlan, RidingFits, run_fused_fit
from .fuse import RIDERS, FusedTask, fusion_groups, run_fused, shared_memory, split_by_memory, task_memory
from .tasks import TileError, TileTask, load_model, run_accumulate, run_tile, save_model
from ..errors import SwathmillError

__all__ = ["Run", "RunOptions", "RunResult", "StepReport", "Progress", "PlanError", "ENGINE_VERSION", "plan_check"]

ENGINE_VERSION = __version__  # the package version, hashed into every step key
log = logging.getLogger("swathmill")


class PlanError(SwathmillError, ValueError):
    """The plan cannot run as asked (misaligned tiles, halo too large, unknown input...)."""


class Progress(Protocol):
    def start(self, step: str, total: int, done: int, phase: str = "tiles") -> None: ...
    def advance(self, step: str, n: int = 1) -> None: ...
    def end(self, step: str) -> None: ...
    def message(self, text: str) -> None: ...


class _Quiet:
    def start(self, step, total, done, phase="tiles"): pass
    def advance(self, step, n=1): pass
    def end(self, step): pass
    def message(self, text): log.info(text)


@dataclass(frozen=True)
class RunOptions:
    """Engine options of a run.

    tile: tile size in pixels (= the shard size of every store unless ``shard`` is given).
    chunk: inner chunk size in pixels (divides the shard); default tile/2 for tiles of 256+ px.
    """

    tile: int = 512
    chunk: int | None = None
    shard: int | None = None
    sharding: bool = True
    zstd_level: int = 1
    export: bool = True
    export_background: bool = True  # on executors that can (Dask): products written while the next steps run
    software: str = "swathmill"
    software_version: str = ENGINE_VERSION
    config_hash: str = ""
    warn_tasks: int = 50_000
    fuse: bool = True  # steps reading the same input share one read per tile (tiles/fuse.py)
    task_memory: int | None = None  # bytes one running task may hold (worker memory / threads); splits fused groups
    incremental: str | None = None  # "frozen" or "refit": per-tile keys, growing stores (tiles.incremental)

    def layout(self) -> StoreLayout:
        shard = self.shard or self.tile
        chunk = self.chunk or (shard // 2 if shard >= 256 and shard % 2 == 0 else shard)
        return StoreLayout(shard=shard, chunk=chunk, zstd_level=self.zstd_level, sharding=self.sharding)


@dataclass
class StepReport:
    name: str
    key: str
    total: int = 0
    done_before: int = 0
    computed: int = 0
    failed: dict = field(default_factory=dict)
    invalidated: str | None = None
    fit: str | None = None  # "fitted", "loaded" or None; incremental: "kept", "extended", "refitted"
    seconds: float = 0.0
    products: list[str] = field(default_factory=list)

    @property
    def complete(self) -> bool:
        return not self.failed and self.done_before + self.computed == self.total


@dataclass
class RunResult:
    steps: list[StepReport] = field(default_factory=list)
    messages: list[str] = field(default_factory=list)
    stopped_at: str | None = None

    @property
    def ok(self) -> bool:
        return self.stopped_at is None and all(s.complete for s in self.steps)


@dataclass(frozen=True)
class _StepPlan:
    """What a step reads and how it is cut: its inputs' stores, metadata and keys, its grid and tiling."""

    inputs: dict
    meta: dict
    grid: Grid
    in_keys: dict
    tiling: Tiling
    version: str
    base: tuple  # what every key of the step hashes: identity, inputs' keys, version, tile size, layout


@dataclass(frozen=True)
class _Fitted:
    """A step's fitted model (None for a step without a fit), where it is saved, its hash, and how it came."""

    model: Any = None
    path: str | None = None
    hash: str | None = None
    state: str | None = None  # "fitted", "loaded" or None


def plan_check(tiling: Tiling, layout: StoreLayout, step: str = "?") -> None:
    """Refuse a plan in which two tiles would touch one shard (lost writes; PITFALLS.md)."""
    unit = layout.shard if layout.sharding else layout.chunk
    if tiling.size % unit:
        raise PlanError(
            f"step {step!r}: tiles of {tiling.size} px would share shards of {unit} px, and two tasks "
            f"writing one shard lose data; use a tile size that is a multiple of {unit} px")


def _sha(*parts: Any) -> str:
    return hashlib.sha256(canonical_json(parts).encode()).hexdigest()[:16]


class Run:
    """One run directory. Use as a context manager (it holds the run's lock)."""

    def __init__(self, run_dir: Path, options: RunOptions | None = None, progress: Progress | None = None):
        self.dir = Path(run_dir).resolve()
        self.options = options or RunOptions()
        self.progress = progress or _Quiet()
        self.lock = RunLock(self.dir / "run.lock")
        self.ledger: Ledger | None = None
        self.invocation = time.strftime("%Y%m%dT%H%M%S") + f"-{time.time_ns() % 10**6:06d}"
        self.known: dict[str, tuple[Path, str, TileStore]] = {}  # finished steps: (store path, key, store)
        self._upcoming: list[Step] = []  # steps of later groups of the current execute() (fits may ride ahead)
        self._exports: list[tuple] = []  # products being written in the background (see _export)
        self._prefit: dict[str, tuple[str, str]] = {}  # step -> (model base, how it was fitted ahead of its turn)

    # paths -----------------------------------------------------------------------------------------
    def store_path(self, name: str) -> Path:
        return self.dir / "stores" / f"{name}.zarr"

    @property
    def products_dir(self) -> Path:
        return self.dir / "products"

    def __enter__(self) -> "Run":
        self.dir.mkdir(parents=True, exist_ok=True)
        self.lock.acquire()
        try:
            for sub in ("models", "stores", "products", "logs"):
                (self.dir / sub).mkdir(exist_ok=True)
            self.ledger = Ledger(self.dir / "ledger.sqlite", invocation=self.invocation)
            self._handler = logging.FileHandler(self.dir / "logs" / f"{self.invocation}.log")
            self._handler.setFormatter(logging.Formatter("%(asctime)s %(levelname)s %(message)s"))
            log.addHandler(self._handler)
            log.setLevel(logging.INFO)
        except BaseException:
            self.lock.release()
            raise
        return self

    def __exit__(self, *exc) -> None:
        try:
            if self.ledger:
                self.ledger.close()
            log.removeHandler(self._handler)
            self._handler.close()
        finally:
            self.lock.release()

    def _say(self, result: RunResult, text: str) -> None:
        result.messages.append(text)
        log.info(text)
        self.progress.message(text)

    # the main loop ---------------------------------------------------------------------------------
    def execute(self, steps: Sequence[Step], executor: Executor | None = None,
                sources: Mapping[str, Path] | None = None) -> RunResult:
        """Run ``steps`` in order (each may read earlier steps' outputs and ``sources`` stores).

        Calls may follow each other on one Run: steps of an earlier call are inputs of later ones.
        """
        if self.ledger is None:
            raise RuntimeError("use the Run as a context manager: `with Run(dir) as run: run.execute(...)`")
        executor = executor or LocalExecutor()
        layout = self.options.layout()
        result = RunResult()
        known = self.known
        for name, path in (sources or {}).items():
            store = TileStore(Path(path))
            known[name] = (Path(path), _sha("source", (Path(path) / "zarr.json").read_text()), store)
        names = [s.name for s in steps]
        dup = {n for n in names if names.count(n) > 1} | (set(names) & set(known))
        if dup:
            raise PlanError(f"step names must be unique; repeated: {sorted(dup)}")
        incremental = self.options.incremental
        if incremental:  # per-tile keys step by step (fused passes are not combined with it yet)
            from .incremental import start_invocation
            start_invocation(self)
        groups = fusion_groups(steps) if self.options.fuse and not incremental else [[s] for s in steps]
        try:
            self._execute_groups(groups, names, executor, layout, known, result, incremental)
        except Exception:
            try:  # the products already being written are kept (and recorded) before the error goes up
                self._collect_exports(wait=True)
            except Exception as exc:  # noqa: BLE001 - the first error is the one raised
                log.error("while stopping after an error: %s", exc)
            raise
        self._collect_exports(wait=True)
        if self.options.incremental:
            from .incremental import fit_notes
            self.ledger.finish_invocation({"complete": result.ok, "fits": fit_notes(self)})
        return result

    def _execute_groups(self, groups: list[list[Step]], names: list[str], executor: Executor,
                        layout: StoreLayout, known, result: RunResult, incremental: str | None) -> None:
        if incremental:
            from .incremental import run_step_incremental
        started: set[str] = set()
        for gi, group in enumerate(groups):
            self._upcoming = [s for g in groups[gi + 1:] for s in g]
            if incremental:
                reports = [run_step_incremental(self, group[0], executor, layout, known, result, incremental,
                                                StepReport, _Fitted)]
            elif len(group) == 1:
                reports = [self._run_step(group[0], executor, layout, known, result)]
            else:
                reports = self._run_group(group, executor, layout, known, result)
            result.steps.extend(reports)
            started.update(s.name for s in group)
            self._collect_exports(wait=False)
            bad = next((r for r in reports if not r.complete), None)
            if bad is not None:
                result.stopped_at = bad.name
                later = [n for n in names if n not in started]
                if later:
                    self._say(result, f"step {bad.name!r} did not finish; not started: {', '.join(later)}")
                break

    def _inputs(self, step: Step, known) -> tuple[dict[str, tuple[str, str]], dict[str, InputMeta], Grid, dict]:
        inputs, meta, keys, grid = {}, {}, {}, None
        for alias, ref in step.inputs.items():
            src, output = ref.split("/")
            if src not in known:
                raise PlanError(f"step {step.name!r}: input {alias!r} refers to {ref!r}, but no earlier step "
                                f"or source is called {src!r} (known: {sorted(known)})")
            path, key, store = known[src]
            if output not in store.specs:
                raise PlanError(f"step {step.name!r}: input {alias!r} refers to {ref!r}, but step {src!r} has "
                                f"outputs {sorted(store.specs)}")
            if grid is not None and store.grid != grid:
                raise PlanError(f"step {step.name!r}: inputs lie on different grids ({ref!r} differs)")
            grid = store.grid
            inputs[alias] = (str(path), output)
            meta[alias] = InputMeta(ref, store.grid, store.specs[output])
            keys[alias] = key
        if step.reader is not None:
            grid = step.grid
        return inputs, meta, grid, keys

    def _run_step(self, step: Step, executor: Executor, layout: StoreLayout, known, result: RunResult) -> StepReport:
        """One step: plan it, fit it, open its store, compute its pending tiles, export its products."""
        t_step = time.perf_counter()
        m = self._prepare(step, executor, layout, known, result)
        sp, fitted, outputs, key, report, store = m.sp, m.fitted, m.outputs, m.key, m.report, m.store
        riding = self._plan_riders([m], layout, known)
        self._compute(step, sp, key, outputs, fitted, m.pending, executor, report, riding)
        self._land_riders(riding, executor, {step.name} if report.complete else set(), result)
        if report.complete:
            known[step.name] = (self.store_path(step.name), key, store)
        if report.complete and self.options.export:
            report.products = self._export(step, key, store, outputs, sp.in_keys, fitted.hash, executor, result)
        report.seconds = time.perf_counter() - t_step
        return report

    def _prepare(self, step: Step, executor: Executor, layout: StoreLayout, known,
                 result: RunResult) -> "_Member":
        """Plan the step, fit it, key it on its model and outputs, open its store and find its pending tiles."""
        sp = self._plan_step(step, layout, known, result)
        fitted = self._fit(step, sp, executor, result)
        outputs = step.resolve_outputs(sp.meta, fitted.model)
        key = _sha("step", *sp.base, fitted.hash, {k: v.to_dict() for k, v in outputs.items()})
        report = StepReport(step.name, key, total=len(sp.tiling), fit=fitted.state)
        store, fresh = self._open_store(step, sp, key, outputs, fitted, report, result)
        pending = self._pending_tiles(step, sp, key, store, fresh, outputs, report, result)
        return _Member(step, sp, key, outputs, fitted, report, store, pending)

    def _plan_step(self, step: Step, layout: StoreLayout, known, result: RunResult) -> "_StepPlan":
        """The step's inputs, grid and tiling, checked against the store layout; the base of its keys."""
        inputs, meta, grid, in_keys = self._inputs(step, known)
        try:
            tiling = Tiling(grid, self.options.tile, step.halo)
            if step.fit:
                Tiling(grid, self.options.tile, step.fit.halo)
        except ValueError as exc:
            raise PlanError(f"step {step.name!r}: {exc}") from exc
        plan_check(tiling, layout, step.name)
        if len(tiling) > self.options.warn_tasks:
            self._say(result, f"step {step.name!r}: {len(tiling)} tiles is past {self.options.warn_tasks} tasks, "
                              "where the scheduler struggles; consider a larger tile size")
        version = f"{self.options.software_version}+{step.version}"
        base = (step.describe(), in_keys, version, self.options.tile, layout.__dict__)
        return _StepPlan(inputs, meta, grid, in_keys, tiling, version, base)

    def _model_base(self, step: Step, sp: "_StepPlan") -> Path:
        return self.dir / "models" / f"{step.name}-{_sha('fit', *sp.base)}"

    def _fit_tiles(self, step: Step, sp: "_StepPlan") -> list:
        tiles = list(Tiling(sp.grid, self.options.tile, step.fit.halo))
        if step.fit.select is not None:
            tiles = list(step.fit.select(tiles, step.params))
        return tiles

    def _fit(self, step: Step, sp: "_StepPlan", executor: Executor, result: RunResult) -> "_Fitted":
        """Load the step's fitted model if one with the same fit key exists, else fit it over its tiles."""
        if step.fit is None:
            return _Fitted()
        mbase = self._model_base(step, sp)
        if mbase.with_suffix(".json").is_file() and mbase.with_suffix(".npz").is_file():
            ahead = self._prefit.pop(step.name, None)
            how = ahead[1] if ahead and ahead[0] == str(mbase) else None
            state = "fitted" if how else "loaded"
            model_hash = hashlib.sha256(mbase.with_suffix(".json").read_bytes()
                                        + mbase.with_suffix(".npz").read_bytes()).hexdigest()[:16]
            self._say(result, f"step {step.name!r}: model fitted {how}, saved as {mbase.name}" if how
                      else f"step {step.name!r}: fitted model loaded from {mbase.name}")
        else:
            t0 = time.perf_counter()
            tasks = [TileTask(step, t.index, sp.grid, self.options.tile, step.fit.halo, sp.inputs)
                     for t in self._fit_tiles(step, sp)]
            self.progress.start(step.name, len(tasks), 0, phase="fit")
            acc = executor.reduce(run_accumulate, tasks, step.fit.merge)
            self.progress.end(step.name)
            model_hash = save_model(step.fit.finalize(acc, step.params, sp.meta), mbase)
            state = "fitted"
            self.ledger.add_timing(step.name, "fit", time.perf_counter() - t0)
            self._say(result, f"step {step.name!r}: model fitted" + (f" on {len(tasks)} tiles" if tasks else "")
                      + f", saved as {mbase.name}")
        return _Fitted(load_model(str(mbase)), str(mbase), model_hash, state)

    def _open_store(self, step: Step, sp: "_StepPlan", key: str, outputs: dict[str, OutputSpec],
                    fitted: "_Fitted", report: StepReport, result: RunResult) -> tuple[TileStore, bool]:
        """Invalidate the step if its key changed, then create its store or reopen it to resume."""
        spath = self.store_path(step.name)
        prev = self.ledger.step_key(step.name)
        if prev is not None and prev != key:
            report.invalidated = f"{prev} -> {key}"
            why = describe_changes(step.name, self.ledger.step_info(step.name), {
                "params": params_dump(step.params), "inputs": dict(step.inputs), "in_keys": sp.in_keys,
                "model": fitted.hash, "tile": self.options.tile, "version": sp.version})
            self._say(result, f"step {step.name!r} changed since the last run ({'; '.join(why) or 'its code'}); "
                              "its tiles and products are recomputed (and so are the steps that read it)")
            self.ledger.forget_step(step.name)
            for p in self.products_dir.glob(f"{step.name}__*"):
                p.unlink()
        fresh = prev != key or not (spath / "zarr.json").is_file()
        if fresh:
            if prev == key:
                self._say(result, f"step {step.name!r}: store missing, recomputing")
                self.ledger.forget_step(step.name)
            store = create_store(spath, sp.grid, outputs, self.options.layout(), attrs={"step": step.name, "key": key})
        else:
            store = TileStore(spath)
            for p in store.remove_partials():
                log.info("removed stale partial write %s", p)
        self.ledger.set_step(step.name, key, len(sp.tiling), {
            "params": params_dump(step.params), "inputs": dict(step.inputs), "in_keys": sp.in_keys,
            "model": fitted.hash, "model_path": fitted.path,
            "outputs": {k: v.to_dict() for k, v in outputs.items()}, "sources": dict(step.sources),
            "grid": sp.grid.to_dict(), "tile": self.options.tile, "version": sp.version})
        return store, fresh

    def _pending_tiles(self, step: Step, sp: "_StepPlan", key: str, store: TileStore, fresh: bool,
                       outputs: dict[str, OutputSpec], report: StepReport, result: RunResult) -> list:
        """Tiles not recorded as done under ``key``; on resume, say which shards a kill left torn."""
        done = self.ledger.done(step.name, key)
        report.done_before = len(done)
        pending = [t for t in sp.tiling if t.index not in done]
        if not fresh and pending:
            first = next(iter(outputs))
            for t in pending:
                if not store.check_readable(first, t.core):
                    self._say(result, f"step {step.name!r}, {t.name}: unreadable shard (a write was cut off); "
                                      "it is rewritten whole")
        if done:
            self._say(result, f"step {step.name!r}: resuming, {len(done)} of {len(sp.tiling)} tiles already finished")
        return pending

    def _compute(self, step: Step, sp: "_StepPlan", key: str, outputs: dict[str, OutputSpec], fitted: "_Fitted",
                 pending: list, executor: Executor, report: StepReport, riding: RidingFits | None = None) -> None:
        """Run the kernel on every pending tile; record each tile in the ledger once it is written."""
        spath = self.store_path(step.name)
        tasks = [TileTask(step, t.index, sp.grid, self.options.tile, step.halo, sp.inputs, str(spath), outputs,
                          fitted.path, riding.riders(step.name, t.index) if riding else ()) for t in pending]
        self.progress.start(step.name, len(sp.tiling), report.done_before)
        t0 = time.perf_counter()

        def on_done(task: TileTask, res: dict) -> None:
            if riding:
                riding.take(task.index, res.pop("riders", None))
            self.ledger.mark(step.name, key, task.index, "done", res.get("seconds", 0.0))
            report.computed += 1
            self.progress.advance(step.name)

        def on_error(task: TileTask, exc: BaseException, tb: str) -> None:
            msg = str(exc) or type(exc).__name__
            self.ledger.mark(step.name, key, task.index, "failed", error=msg)
            report.failed[task.index] = msg
            log.error("%s\n%s", msg, tb)

        executor.map(run_tile, tasks, on_done, on_error)
        self.progress.end(step.name)
        self.ledger.add_timing(step.name, "tiles", time.perf_counter() - t0)

    # fused passes (tiles/fuse.py) -------------------------------------------------------------------
    def _run_group(self, group: Sequence[Step], executor: Executor, layout: StoreLayout, known,
                   result: RunResult) -> list[StepReport]:
        """Steps that read the same input: each is planned, fitted and opened on its own (own key,
        invalidation, ledger), then their pending tiles run in one pass that reads each tile once."""
        t_group = time.perf_counter()
        self._shared_fits(group, executor, layout, known)
        preps = []
        for step in group:
            preps.append(self._prepare(step, executor, layout, known, result))
        prep_s = time.perf_counter() - t_group
        riding = self._plan_riders(preps, layout, known)
        for part in self._split_group(preps, layout):
            self._compute_fused(part, executor, result, riding)
        self._land_riders(riding, executor, {m.step.name for m in preps if m.report.complete}, result)
        reports = []
        for m in preps:
            if m.report.complete:
                known[m.step.name] = (self.store_path(m.step.name), m.key, m.store)
            if m.report.complete and self.options.export:
                m.report.products = self._export(m.step, m.key, m.store, m.outputs, m.sp.in_keys, m.fitted.hash,
                                                 executor, result)
            m.report.seconds += prep_s / len(preps)
            reports.append(m.report)
        return reports

    def _split_group(self, preps: list["_Member"], layout: StoreLayout) -> list[list["_Member"]]:
        """The group cut to the per-task memory limit (RunOptions.task_memory) by the steps' estimates."""
        m0 = preps[0]
        t = self.options.tile
        pad = (min(t + 2 * max(p.step.halo for p in preps), m0.sp.grid.rows),
               min(t + 2 * max(p.step.halo for p in preps), m0.sp.grid.cols))
        ins = [mi.spec for mi in m0.sp.meta.values()]
        shared = shared_memory(pad, ins)
        mem = {id(p): task_memory(pad, ins, p.outputs.values(), core=(t, t), decode=p.step.decode) for p in preps}
        parts = split_by_memory([id(p) for p in preps], mem, shared, self.options.task_memory)
        by_id = {id(p): p for p in preps}
        out = [[by_id[i] for i in part] for part in parts]
        if len(out) > 1:
            log.info("fused group %s split by memory into %s", [p.step.name for p in preps],
                     [[p.step.name for p in part] for part in out])
        return out

    def _compute_fused(self, part: list["_Member"], executor: Executor, result: RunResult,
                       riding: RidingFits | None = None) -> None:
        """One pass over the union of the members' pending tiles; each member's tile recorded on its own."""
        if len(part) == 1:
            m = part[0]
            self._compute(m.step, m.sp, m.key, m.outputs, m.fitted, m.pending, executor, m.report, riding)
            return
        by_tile: dict[tuple[int, int], list[TileTask]] = {}
        for m in part:
            spath = self.store_path(m.step.name)
            for t in m.pending:
                by_tile.setdefault(t.index, []).append(TileTask(
                    m.step, t.index, m.sp.grid, self.options.tile, m.step.halo, m.sp.inputs, str(spath),
                    m.outputs, m.fitted.path, riding.riders(m.step.name, t.index) if riding else ()))
        tasks = [FusedTask(tuple(v), riding.group_riders({t.step.name for t in v}, k) if riding else ())
                 for k, v in sorted(by_tile.items())]
        by_name = {m.step.name: m for m in part}
        for m in part:
            self.progress.start(m.step.name, len(m.sp.tiling), m.report.done_before)
        own = {m.step.name: 0.0 for m in part}
        t0 = time.perf_counter()

        def on_done(task: FusedTask, res: dict) -> None:
            if riding:
                riding.take(task.index, res.pop(RIDERS, None))
            for name, r in res.items():
                m = by_name[name]
                if "error" in r:
                    self.ledger.mark(name, m.key, task.index, "failed", error=r["error"])
                    m.report.failed[task.index] = r["error"]
                    log.error("%s", r["error"])
                else:
                    if riding:
                        riding.take(task.index, r.pop("riders", None))
                    secs = r.get("seconds", 0.0) + r.get("read_seconds", 0.0)
                    own[name] += secs
                    self.ledger.mark(name, m.key, task.index, "done", secs)
                    m.report.computed += 1
                    self.progress.advance(name)

        def on_error(task: FusedTask, exc: BaseException, tb: str) -> None:
            msg = str(exc) or type(exc).__name__
            for tt in task.members:
                m = by_name[tt.step.name]
                self.ledger.mark(m.step.name, m.key, task.index, "failed", error=msg)
                m.report.failed[task.index] = msg
            log.error("%s\n%s", msg, tb)

        executor.map(run_fused, tasks, on_done, on_error)
        wall = time.perf_counter() - t0
        total = sum(own.values()) or 1.0
        for m in part:
            self.progress.end(m.step.name)
            share = wall * (own[m.step.name] / total if sum(own.values()) else 1.0 / len(part))
            self.ledger.add_timing(m.step.name, "tiles", share)
            m.report.seconds += share
        self._say(result, f"fused pass over {len(tasks)} tiles for steps {', '.join(by_name)} "
                          f"({wall:.1f}s, each tile read once)")

    # fits that read nothing again (tiles/fitpass.py) -------------------------------------------------
    def _missing_fit(self, step: Step, layout: StoreLayout, known) -> tuple | None:
        """``(plan, model base, fit tiles)`` of a step whose fitted model is not saved yet, else None."""
        if step.fit is None or step.name in self._prefit:
            return None
        try:
            sp = self._plan_step(step, layout, known, RunResult())
        except PlanError:
            return None  # said when its turn comes
        mbase = self._model_base(step, sp)
        if mbase.with_suffix(".json").is_file() and mbase.with_suffix(".npz").is_file():
            return None
        tiles = self._fit_tiles(step, sp)
        return (sp, mbase, tiles) if tiles else None

    def _shared_fits(self, group: Sequence[Step], executor: Executor, layout: StoreLayout, known) -> None:
        """Fit, in one pass that reads each tile once, the steps of a fused group whose models are missing."""
        todo = [(s, *f) for s in group if (f := self._missing_fit(s, layout, known)) is not None]
        if len(todo) < 2:
            return
        trees, by_tile, secs = {}, {}, {s.name: 0.0 for s, *_ in todo}
        for step, sp, _mbase, tiles in todo:
            trees[step.name] = (PairTree(len(tiles), step.fit.merge), {t.index: k for k, t in enumerate(tiles)})
            for t in tiles:
                by_tile.setdefault(t.index, []).append(
                    (step.name, TileTask(step, t.index, sp.grid, self.options.tile, step.fit.halo, sp.inputs)))
        tasks = [FusedFit(tuple(v)) for _k, v in sorted(by_tile.items())]
        errors: list[BaseException] = []

        def on_done(task: FusedFit, res: dict) -> None:
            for slot, (value, sec) in res.items():
                tree, pos = trees[slot]
                tree.push(pos[task.index], value)
                secs[slot] += sec

        label = "+".join(secs)
        t0 = time.perf_counter()
        self.progress.start(label, len(tasks), 0, phase="fit")
        executor.map(run_fused_fit, tasks, on_done, lambda task, exc, tb: errors.append(exc))
        self.progress.end(label)
        if errors:
            raise errors[0] if isinstance(errors[0], TileError) else TileError(str(errors[0]))
        wall, total = time.perf_counter() - t0, sum(secs.values())
        for step, sp, mbase, tiles in todo:
            t1 = time.perf_counter()
            save_model(step.fit.finalize(trees[step.name][0].result, step.params, sp.meta), mbase)
            share = wall * (secs[step.name] / total if total else 1.0 / len(todo))
            self.ledger.add_timing(step.name, "fit", share + time.perf_counter() - t1)
            others = ", ".join(n for n in secs if n != step.name)
            self._prefit[step.name] = (str(mbase), f"on {len(tiles)} tiles in a pass shared with {others} "
                                                   "(each tile read once)")

    def _plan_riders(self, members: Sequence["_Member"], layout: StoreLayout, known) -> RidingFits:
        """Fits of later steps (fit halo 0) that read only what the members' tile tasks have in memory:
        a member's outputs (riding on its tile task), or, in a fused pass, the pass's shared input and the
        outputs of several members (riding on the fused task). Fusion only, not in incremental runs."""
        if not self.options.fuse or self.options.incremental:
            return RidingFits([], self.options.tile)
        carriers = {m.step.name: m for m in members if m.pending}
        group_refs = set(members[0].step.inputs.values()) if len(members) > 1 else set()
        plans = []
        for s in self._upcoming:
            if s.fit is None or s.fit.halo != 0 or s.reader is not None:
                continue
            refs = set(s.inputs.values())
            needs = frozenset(r.split("/")[0] for r in refs if r.split("/")[0] in carriers)
            shared = bool(refs & group_refs)
            if not needs or any(r not in group_refs and r.split("/")[0] not in carriers for r in refs):
                continue
            ahead = dict(known)
            for n in needs:
                ahead[n] = (self.store_path(n), carriers[n].key, carriers[n].store)
            miss = self._missing_fit(s, layout, ahead)
            if miss is not None:
                sp, mbase, tiles = miss
                plans.append(RidePlan(s, sp, mbase, tiles, needs, shared, PairTree(len(tiles), s.fit.merge),
                                      {t.index: k for k, t in enumerate(tiles)}, set()))
        return RidingFits(plans, self.options.tile)

    def _land_riders(self, riding: RidingFits, executor: Executor, complete: set[str], result: RunResult) -> None:
        """Finish the riding fits whose carriers completed and save their models for their turn."""
        if not riding:
            return
        par = max(1, getattr(executor, "max_in_flight", 2) // 2)
        for p, model, n_read in riding.finish(executor, complete):
            t0 = time.perf_counter()
            save_model(model, p.mbase)
            self.ledger.add_timing(p.step.name, "fit", p.seconds / par + time.perf_counter() - t0)
            whose = f"step {p.carrier!r}'s pass" if len(p.needs) == 1 and not p.shared else f"the pass of {p.carrier}"
            self._prefit[p.step.name] = (str(p.mbase), f"during {whose} ({len(p.carried)} tiles accumulated from "
                                                       f"memory, {n_read} read)")
        for p in riding.plans:
            if p.error is not None and p.needs <= complete:
                log.info("step %r: its fit did not ride on %r's pass (%s); it fits on its own", p.step.name,
                         p.carrier, p.error)

    def provenance(self, step: Step, key: str, in_keys: dict, model_hash: str | None) -> dict:
        return {
            "software": self.options.software,
            "software_version": self.options.software_version,
            "config_hash": self.options.config_hash or "unset",  # GDAL drops empty tags
            "step": step.name,
            "step_key": key,
            "parameters": canonical_json(params_dump(step.params)),
            "inputs": canonical_json({a: {"ref": step.inputs[a], "key": k} for a, k in in_keys.items()}),
            "input_fingerprints": canonical_json({**in_keys, **dict(step.sources)}),
            "model_hash": model_hash or "none",
            "created": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
        }

    def _export(self, step: Step, key: str, store: TileStore, outputs: dict[str, OutputSpec], in_keys: dict,
                model_hash: str | None, executor: Executor, result: RunResult) -> list[str]:
        """Write the step's products (those missing or made from another key). On an executor that can
        run tasks in the background (Dask) they are started and the run goes on with the next steps while
        they are written (nothing later in a run reads a product); each is recorded in the ledger as it
        lands, and :meth:`_collect_exports` waits for the last ones before the run returns. The returned
        list fills as they land. The ledger's "export" time is the seconds spent writing them."""
        todo, made = [], []
        prov = self.provenance(step, key, in_keys, model_hash)
        for name, spec in outputs.items():
            if not spec.product:
                continue
            path = self.products_dir / f"{step.name}__{name}.tif"
            rec = self.ledger.product(step.name, name)
            if rec and rec[0] == key and path.is_file() and Path(str(path) + ".json").is_file():
                made.append(str(path))
                continue
            todo.append(ExportTask(str(store.path), name, str(path), prov, f"{step.name}-{name}"))
        errors: list[str] = []
        spent, left = [0.0], [len(todo)]

        def landed() -> None:
            left[0] -= 1
            if left[0] == 0 and spent[0]:
                self.ledger.add_timing(step.name, "export", spent[0])

        def on_done(task: "ExportTask", res) -> None:
            path, seconds = res
            self.ledger.set_product(step.name, key, task.output, path)
            made.append(path)
            spent[0] += seconds
            landed()

        def on_error(task: "ExportTask", exc, tb) -> None:
            errors.append(f"step {step.name!r}, product {Path(task.path).name}: {exc}")
            log.error("%s\n%s", exc, tb)
            landed()

        if not todo:
            return made
        submit = getattr(executor, "submit", None) if self.options.export_background else None
        if submit is not None:
            self._exports.append((submit(timed_export, todo), on_done, on_error, errors, result))
            return made
        executor.map(timed_export, todo, on_done, on_error)
        self._raise_export_errors(errors, result)
        return made

    def _raise_export_errors(self, errors: list[str], result: RunResult) -> None:
        for e in errors:
            self._say(result, e)
        if errors:
            raise RuntimeError("; ".join(errors))

    def _collect_exports(self, wait: bool) -> None:
        """Record the background exports that have landed (every one, waiting, with ``wait``); raise on
        the first step whose products failed, once every export has been waited for."""
        keep, failed = [], []
        for bg, on_done, on_error, errors, result in self._exports:
            bg.collect(on_done, on_error, wait=wait)
            if bg.pending:
                keep.append((bg, on_done, on_error, errors, result))
            elif errors:
                failed.append((errors, result))
        self._exports = keep
        for errors, result in failed:
            self._raise_export_errors(errors, result)


@dataclass
class _Member:
    """A step of a fused group once planned, fitted and opened: what its share of the pass needs."""

    step: Step
    sp: _StepPlan
    key: str
    outputs: dict
    fitted: _Fitted
    report: StepReport
    store: TileStore
    pending: list


@dataclass(frozen=True)
class ExportTask:
    store: str
    output: str
    path: str
    provenance: dict
    label: str


def timed_export(task: ExportTask) -> tuple[str, float]:
    """:func:`export_product` and the seconds it took (runs on a worker)."""
    t0 = time.perf_counter()
    path = export_product(task)
    return path, time.perf_counter() - t0


def export_product(task: ExportTask) -> str:
    """Write one output of a store as a COG with its STAC item (runs on a worker)."""
    from .export import stac_item, write_cog

    store = TileStore(Path(task.store))
    spec = store.specs[task.output]
    tags = {k: str(v) for k, v in task.provenance.items()}
    path = write_cog(Path(task.path), lambda win: store.read(task.output, win), store.grid, spec, tags)
    stac_item(path, store.grid, spec, task.provenance, item_id=Path(task.path).stem)
    return str(path)


def run_status(run_dir: Path) -> list[dict]:
    """Per step: key, tiles total, done, failed (with errors), pending. Reads the ledger only."""
    ledger = Ledger(Path(run_dir) / "ledger.sqlite")
    try:
        out = []
        for s in ledger.steps():
            done = ledger.done(s["name"], s["key"])
            if s["info"].get("incremental"):  # per-tile keys (tiles.incremental)
                done = set(ledger.tile_keys(s["name"]))
            failed = ledger.failed(s["name"], s["key"])
            total = s["total"] or 0
            out.append({"step": s["name"], "key": s["key"], "total": total, "done": len(done),
                        "failed": len(failed), "pending": total - len(done),
                        "errors": {f"{i},{j}": e for (i, j), e in failed.items()}})
        return out
    finally:
        ledger.close()
