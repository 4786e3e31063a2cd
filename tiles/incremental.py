"""Growing campaigns: per-tile keys, stores that grow without rewriting, fitted models kept across runs.

A run with ``RunOptions.incremental`` set (``"frozen"`` or ``"refit"``) computes each step tile by tile under
*per-tile keys* instead of one key for the whole step:

- A step's **stable key** hashes what does not depend on the campaign's extent or its list of lines:
  its identity and parameters (for a step whose parameters offer ``campaign_free()``, only that
  part), its inputs' stable keys, its kept model's hash, the tile layout and the code version. When
  it changes, the step is recomputed whole, as in an ordinary run.
- A **tile key** hashes the stable key, the tile's absolute index (:func:`~swathmill.tiles.grid.tile_origin`)
  and what the tile reads: for a step with a reader whose parameters offer ``tile_identity(window,
  model)`` (the mosaic: the lines it touches, their fingerprints and brightness corrections), that;
  for a step reading other steps, the tile keys of every input tile its padded window meets (so a
  neighbour that appears or changes inside the halo counts). A tile is recomputed exactly when its
  key differs from the one the ledger recorded for it.
- **Stores grow** without rewriting: when the grid grows (it must stay on the lattice of whole tiles,
  see :func:`~swathmill.tiles.grid.anchor_grid`), a new store is made for the new grid and every
  existing shard file is *moved* into it at its shifted index; the ledger's tile indices shift by the
  same amount, in one transaction. A journal (``stores/<step>.zarr.regrid.json``) makes the move
  resumable after a kill.
- **Frozen fits**: a step's fitted model is kept in ``models/frozen/`` (a pointer file names the
  current one) and reused by later invocations. A step whose parameters offer ``frozen_stale``,
  ``frozen_select`` and ``frozen_finalize`` (the mosaic's brightness matching) extends the kept model
  to new inputs by accumulating only the tiles that ``frozen_select`` names.

- **Refit** (``"refit"``): every fit is fitted again exactly. Each fit tile's accumulator result is
  kept in ``models/refit/accumulators/<step>/`` without pickle (:mod:`~swathmill.tiles.accstore`)
  under an *accumulator key* (what the tile's fit window reads, the fit's settings, the tile's place
  in the grid); a tile is accumulated again only when its key changes. The results are merged in the
  fixed pairwise tree of :func:`~swathmill.tiles.executors.merge_tree` over the fit tiles in their
  absolute order, the order a fresh fit reduces in, so the model equals a fresh run's bit for bit.
  The model is kept in ``models/refit/``; a model that hashes as before leaves the step's key, and
  so its tiles, as they were.

Every invocation records its mode, the campaign's line events (``campaign`` table) and per step
which tiles it recomputed, for ``status`` and the report.
"""
from __future__ import annotations

import hashlib
import json
import os
import shutil
import time
from pathlib import Path
from typing import TYPE_CHECKING, Any

from ..errors import SwathmillError
from .grid import Grid, Tiling, tile_origin
from .step import OutputSpec, Step, canonical_json
from .store import TileStore, create_store
from .tasks import TileTask, load_model, run_accumulate, run_tile, save_model

if TYPE_CHECKING:  # pragma: no cover
    from .accstore import AccumulatorFiles
    from .executors import Executor

__all__ = ["MODES", "IncrementalError", "start_invocation", "run_step_incremental", "regrid_store", "campaign_history", "campaign_notes",
           "frozen_model_dir", "refit_model_dir", "fit_notes"]

MODES = ("frozen", "refit")


class IncrementalError(SwathmillError, ValueError):
    """An incremental run cannot go ahead (unknown mode, a grid off the tile lattice)."""


def _sha(*parts: Any) -> str:
    return hashlib.sha256(canonical_json(parts).encode()).hexdigest()[:16]


def frozen_model_dir(run_dir: Path) -> Path:
    """Where kept models live: ``<run>/models/frozen`` (copy it to give a fresh run the same models)."""
    return Path(run_dir) / "models" / "frozen"


def _file_hash(base: Path) -> str:
    return hashlib.sha256(base.with_suffix(".json").read_bytes() + base.with_suffix(".npz").read_bytes()).hexdigest()[:16]


def _fit_identity(step: Step) -> str:
    """What a kept model was fitted for: the step's fit and settings (not its inputs or extent)."""
    from .step import params_dump

    params = step.params.campaign_free() if hasattr(step.params, "campaign_free") else params_dump(step.params)
    fit = step.fit
    return _sha("kept-fit", step.name, step.version, params,
                [f"{f.__module__}.{f.__qualname__}" for f in (fit.accumulate, fit.merge, fit.finalize)] if fit else None)


def _current_model(run_dir: Path, name: str, ident: str | None = None, folder: Path | None = None) -> Path | None:
    """The kept model of step ``name``; None if there is none or it was fitted with other settings."""
    ptr = (folder or frozen_model_dir(run_dir)) / f"{name}.current"
    if not ptr.is_file():
        return None
    lines = ptr.read_text().split()
    if ident is not None and (len(lines) < 2 or lines[1] != ident):
        return None
    base = ptr.parent / lines[0]
    if base.with_suffix(".json").is_file() and base.with_suffix(".npz").is_file():
        return base
    return None


def _keep_model(run_dir: Path, name: str, model: dict, ident: str = "", folder: Path | None = None) -> Path:
    """Save ``model`` under its content hash and point ``<name>.current`` at it (atomically)."""
    d = folder or frozen_model_dir(run_dir)
    d.mkdir(parents=True, exist_ok=True)
    tmp = d / f"{name}-new"
    h = save_model(model, tmp)
    base = d / f"{name}-{h}"
    for suf in (".json", ".npz"):
        os.replace(tmp.with_suffix(suf), base.with_suffix(suf))
    ptr_tmp = d / f"{name}.current.tmp"
    ptr_tmp.write_text(f"{base.name}\n{ident}\n")
    os.replace(ptr_tmp, d / f"{name}.current")
    return base


def _frozen_fit(run: "Run", step: Step, sp, executor: "Executor", result: "RunResult", _Fitted: type):
    """The kept model of ``step`` (extended to new inputs where the step knows how), else a first fit."""
    if step.fit is None:
        return _Fitted()
    ident = _fit_identity(step)
    base = _current_model(run.dir, step.name, ident)
    if base is None:
        if _current_model(run.dir, step.name) is not None:
            run._say(result, f"step {step.name!r}: its fit settings changed; the kept model is fitted again")
        fitted = run._fit(step, sp, executor, result)
        base = _keep_model(run.dir, step.name, load_model(fitted.path), ident)
        run._say(result, f"step {step.name!r}: model fitted and kept for later invocations ({base.name})")
        fit_notes(run)[step.name] = {"mode": "frozen", "model": "fitted"}
        return _Fitted(load_model(str(base)), str(base), _file_hash(base), "fitted")
    model = load_model(str(base))
    params = step.params
    if hasattr(params, "frozen_stale") and params.frozen_stale(model):
        t0 = time.perf_counter()
        tiles = list(Tiling(sp.grid, run.options.tile, step.fit.halo))
        tiles = list(params.frozen_select(tiles, model))
        tasks = [TileTask(step, t.index, sp.grid, run.options.tile, step.fit.halo, sp.inputs) for t in tiles]
        run.progress.start(step.name, len(tasks), 0, phase="fit")
        acc = executor.reduce(run_accumulate, tasks, step.fit.merge) if tasks else None
        run.progress.end(step.name)
        base = _keep_model(run.dir, step.name, params.frozen_finalize(acc, model, sp.meta), ident)
        run.ledger.add_timing(step.name, "fit", time.perf_counter() - t0)
        run._say(result, f"step {step.name!r}: kept model extended to new inputs over {len(tasks)} tiles "
                         f"({base.name})")
        fit_notes(run)[step.name] = {"mode": "frozen", "model": "extended", "accumulated": len(tasks)}
        return _Fitted(load_model(str(base)), str(base), _file_hash(base), "extended")
    run._say(result, f"step {step.name!r}: kept model reused ({base.name})")
    fit_notes(run)[step.name] = {"mode": "frozen", "model": "kept"}
    return _Fitted(model, str(base), _file_hash(base), "kept")


# ---------------------------------------------------------------------------------------------------
# refit: models fitted again exactly from kept per-tile accumulator results


def refit_model_dir(run_dir: Path) -> Path:
    """Where refit mode keeps its models (``<run>/models/refit``) and, under ``accumulators/<step>``,
    the per-tile accumulator results of each step's fit (:mod:`swathmill.tiles.accstore`)."""
    return Path(run_dir) / "models" / "refit"


def _acc_files(run: "Run", step: Step) -> "AccumulatorFiles":
    from .accstore import AccumulatorFiles

    fit = step.fit
    trusted = {f.__module__ for f in (fit.accumulate, fit.merge, fit.finalize) if hasattr(f, "__module__")}
    return AccumulatorFiles(refit_model_dir(run.dir) / "accumulators" / step.name, step.name, trusted)


def _acc_keys(run: "Run", step: Step, sp, tiles: list, origin) -> dict[tuple[int, int], str]:
    """Per local index of a fit tile: the key of its accumulator result.

    It hashes what ``Fit.accumulate`` sees: the step (for a step reading lines, its campaign-free
    settings and the lines its fit window reads, ``params.fit_tile_identity(tile)`` where offered,
    else ``tile_identity``; otherwise its whole identity and the tile keys of the input tiles its
    window meets), the accumulate function and halo, and the tile's absolute index, local index and
    clamped padded window (an accumulator may use grid-local coordinates, so a grid that grows west or
    north re-accumulates every tile; one that grows east or south only those whose window changed).
    """
    fit, params = step.fit, step.params
    keyed = hasattr(params, "tile_identity") and step.reader is not None
    fn = f"{fit.accumulate.__module__}.{fit.accumulate.__qualname__}"
    if keyed:
        base = _sha("acc", step.name, step.version, params.campaign_free(), fn, fit.halo, sp.version,
                    run.options.tile, sp.grid.crs, list(sp.grid.res))
    else:
        base = _sha("acc", *sp.base, fn, fit.halo)
    keys = {}
    for t in tiles:
        pw = t.padded
        if keyed:
            what: Any = (params.fit_tile_identity(t) if hasattr(params, "fit_tile_identity")
                         else params.tile_identity(pw, None))
        else:
            what = _input_cells(run, step, pw, origin)
        keys[t.index] = _sha("acc-tile", base, [origin[0] + t.index[0], origin[1] + t.index[1]], list(t.index),
                             [pw.row, pw.col, pw.rows, pw.cols], what)
    return keys


def _accumulate_changed(run: "Run", step: Step, sp, executor: "Executor", files, tiles: list, keys: dict,
                        origin) -> int:
    """Accumulate the fit tiles whose kept result is missing or was computed under another key; keep each."""
    from .tasks import TileError

    absidx = {t.index: (origin[0] + t.index[0], origin[1] + t.index[1]) for t in tiles}
    stale = [t for t in tiles if files.key(absidx[t.index]) != keys[t.index]]
    tasks = [TileTask(step, t.index, sp.grid, run.options.tile, step.fit.halo, sp.inputs) for t in stale]
    run.progress.start(step.name, len(tiles), len(tiles) - len(tasks), phase="fit")
    errors: list[str] = []

    def on_done(task: TileTask, acc: Any) -> None:
        files.save(absidx[task.index], keys[task.index], acc)
        run.progress.advance(step.name)

    def on_error(task: TileTask, exc: BaseException, tb: str) -> None:
        errors.append(str(exc) or type(exc).__name__)

    executor.map(run_accumulate, tasks, on_done, on_error)
    run.progress.end(step.name)
    if errors:
        raise TileError(f"step {step.name!r}: the refit's accumulation failed on {len(errors)} tile(s): "
                        + "; ".join(errors[:3]))
    return len(tasks)


def _refit(run: "Run", step: Step, sp, executor: "Executor", result: "RunResult", _Fitted: type, origin):
    """The step's model fitted again exactly: changed fit tiles accumulated, kept results of the others merged.

    The results are merged in the fixed pairwise tree of :func:`~swathmill.tiles.executors.merge_tree`
    over the fit's tiles in the order of their absolute index, which is the order of the tiling a
    fresh fit reduces over (row-major), so the model equals a fresh run's bit for bit.
    """
    from .executors import merge_tree

    if step.fit is None:
        return _Fitted()
    t0 = time.perf_counter()
    tiles = list(Tiling(sp.grid, run.options.tile, step.fit.halo))
    if step.fit.select is not None:
        tiles = list(step.fit.select(tiles, step.params))
    tiles.sort(key=lambda t: t.index)  # absolute order: the origin is the same for every tile
    keys = _acc_keys(run, step, sp, tiles, origin)
    files = _acc_files(run, step)
    files.clean((origin[0] + t.index[0], origin[1] + t.index[1]) for t in tiles)
    n = _accumulate_changed(run, step, sp, executor, files, tiles, keys, origin)
    accs = [files.load((origin[0] + t.index[0], origin[1] + t.index[1]), keys[t.index]) for t in tiles]
    acc = merge_tree(accs, step.fit.merge)
    folder = refit_model_dir(run.dir)
    prev = _current_model(run.dir, step.name, folder=folder)
    base = _keep_model(run.dir, step.name, step.fit.finalize(acc, step.params, sp.meta), _fit_identity(step), folder)
    run.ledger.add_timing(step.name, "fit", time.perf_counter() - t0)
    same = prev is not None and prev.name == base.name
    how = "unchanged" if same else ("changed" if prev is not None else "new")
    fit_notes(run)[step.name] = {"mode": "refit", "tiles": len(tiles), "accumulated": n, "model": how}
    run._say(result, f"step {step.name!r}: model refitted over {len(tiles)} tiles, {n} accumulated again and "
                     f"{len(tiles) - n} merged from kept results; the model is {how} ({base.name})")
    return _Fitted(load_model(str(base)), str(base), _file_hash(base), "refitted")


def fit_notes(run: "Run") -> dict:
    """What each step's fit did in this invocation (recorded with the invocation, shown by status)."""
    if not hasattr(run, "_incremental_fits"):
        run._incremental_fits = {}
    return run._incremental_fits


def _plain_outputs(outputs: dict[str, OutputSpec], keyed: bool) -> dict:
    """Outputs as hashed into the stable key; a keyed step's class names follow its tiles' keys."""
    out = {}
    for k, v in outputs.items():
        d = v.to_dict()
        if keyed:
            d = {kk: vv for kk, vv in d.items() if kk != "class_names"}
            d["attrs"] = {a: b for a, b in d.get("attrs", {}).items()}
        out[k] = d
    return out


def _stable_key(run: "Run", step: Step, sp, fitted, outputs: dict[str, OutputSpec]) -> tuple[str, bool]:
    keyed = hasattr(step.params, "tile_identity") and step.reader is not None
    layout = run.options.layout()
    if keyed:
        ident = {"name": step.name, "version": step.version,
                 "kernel": f"{step.kernel.__module__}.{step.kernel.__qualname__}",
                 "params": step.params.campaign_free(), "halo": step.halo, "decode": step.decode,
                 "reader": f"{step.reader.__module__}.{step.reader.__qualname__}",
                 "crs": sp.grid.crs, "res": list(sp.grid.res)}
        key = _sha("istep", ident, sp.version, run.options.tile, layout.__dict__, _plain_outputs(outputs, True))
    else:
        key = _sha("istep", *sp.base, fitted.hash, _plain_outputs(outputs, False))
    return key, keyed


def _input_cells(run: "Run", step: Step, window, origin) -> dict:
    """The tile keys of every input tile ``window`` (a padded window) meets, per input alias."""
    I0, J0 = origin
    size = run.options.tile
    what: dict = {}
    for alias, ref in step.inputs.items():
        tk = _incr_keys(run).get(ref.split("/")[0])
        if tk is None:  # an input without tile keys (a source store): its whole key is in the stable key
            continue
        cells = []
        for i in range(window.row // size, -(-(window.row + window.rows) // size)):
            for j in range(window.col // size, -(-(window.col + window.cols) // size)):
                a = (I0 + i, J0 + j)
                cells.append([a[0], a[1], tk.get(a)])
        what[alias] = cells
    return what


def _tile_keys(run: "Run", step: Step, sp, stable: str, keyed: bool, fitted, origin) -> dict[tuple[int, int], str]:
    """Per local tile index: its key (absolute index, stable key, what it reads)."""
    I0, J0 = origin
    keys: dict[tuple[int, int], str] = {}
    for t in sp.tiling:
        absidx = (I0 + t.index[0], J0 + t.index[1])
        if keyed:
            what: Any = step.params.tile_identity(t.padded, fitted.model)
        else:
            pw = t.padded
            what = _input_cells(run, step, pw, origin)
            # the clamped padded window changes when the grid grows past a tile's halo
            what["padded"] = [pw.row - t.core.row, pw.col - t.core.col, pw.rows, pw.cols]
        keys[t.index] = _sha("tile", stable, list(absidx), what)
    return keys


def _incr_keys(run: "Run") -> dict:
    if not hasattr(run, "_tile_keys_by_step"):
        run._tile_keys_by_step = {}
    return run._tile_keys_by_step


# ---------------------------------------------------------------------------------------------------
# growing a store


def _journal(path: Path) -> Path:
    return path.with_name(path.name + ".regrid.json")


def regrid_store(path: Path, old: Grid, new: Grid, size: int, outputs: dict[str, OutputSpec], layout,
                 attrs: dict, on_moved=None) -> None:
    """Move a store onto a larger grid on the same tile lattice, shard files moved, never rewritten.

    ``on_moved()`` runs after the files are in place and before the journal is removed (the ledger
    shift). Safe to call again after a kill: an existing journal is finished instead of restarted.
    """
    path = Path(path)
    jpath = _journal(path)
    new_path = path.with_name(path.name + ".regrid")
    old_path = path.with_name(path.name + ".old")
    oi, oj = tile_origin(old, size)
    ni, nj = tile_origin(new, size)
    di, dj = oi - ni, oj - nj
    if not jpath.is_file():
        for p in (new_path, path.with_name(path.name + ".regrid.tmp")):
            if p.exists():
                shutil.rmtree(p)
        tmp = path.with_name(path.name + ".regrid.tmp")
        create_store(tmp, new, outputs, layout, attrs=attrs)
        os.replace(tmp, new_path)
        jtmp = jpath.with_name(jpath.name + ".tmp")
        jtmp.write_text(json.dumps({"old": old.to_dict(), "new": new.to_dict(), "di": di, "dj": dj}))
        os.replace(jtmp, jpath)
    if new_path.is_dir() and path.is_dir():
        for name in [*outputs, "valid"]:
            src_root = path / name / "c"
            if not src_root.is_dir():
                continue
            for f in sorted(src_root.rglob("*")):
                if not f.is_file():
                    continue
                parts = list(f.relative_to(src_root).parts)
                parts[-2] = str(int(parts[-2]) + di)
                parts[-1] = str(int(parts[-1]) + dj)
                dst = new_path / name / "c" / Path(*parts)
                dst.parent.mkdir(parents=True, exist_ok=True)
                os.replace(f, dst)
        os.replace(path, old_path)
    if new_path.is_dir() and not path.exists():
        os.replace(new_path, path)
    if old_path.exists():
        shutil.rmtree(old_path)
    if on_moved is not None:
        on_moved(di, dj)
    jpath.unlink(missing_ok=True)


def _finish_regrid(run: "Run", name: str, layout) -> None:
    """Finish a store move a kill interrupted (before anything else reads the store)."""
    spath = run.store_path(name)
    jpath = _journal(spath)
    if not jpath.is_file():
        return
    j = json.loads(jpath.read_text())
    old, new = Grid.from_dict(j["old"]), Grid.from_dict(j["new"])
    staged = spath.with_name(spath.name + ".regrid")
    src = TileStore(staged if staged.is_dir() else spath)
    regrid_store(spath, old, new, run.options.tile, src.specs, layout, {}, on_moved=lambda di, dj:
                 run.ledger.regrid_step(name, old.to_dict(), new.to_dict(), di, dj))


def _open_store_incremental(run: "Run", step: Step, sp, stable: str, outputs: dict[str, OutputSpec], fitted,
                            report: "StepReport", result: "RunResult", mode: str) -> TileStore:
    layout = run.options.layout()
    spath = run.store_path(step.name)
    _finish_regrid(run, step.name, layout)
    prev = run.ledger.step_key(step.name)
    info = run.ledger.step_info(step.name) or {}
    attrs = {"step": step.name, "key": stable}
    restart = prev != stable or not (spath / "zarr.json").is_file()
    old = Grid.from_dict(info["grid"]) if info.get("grid") else None
    if not restart and old != sp.grid:
        size = run.options.tile
        try:
            oi, oj = tile_origin(old, size)
            ni, nj = tile_origin(sp.grid, size)
        except ValueError:
            restart = True
        else:
            grows = (oi >= ni and oj >= nj and oi + old.rows // size <= ni + -(-sp.grid.rows // size)
                     and oj + old.cols // size <= nj + -(-sp.grid.cols // size) and old.crs == sp.grid.crs
                     and old.res == sp.grid.res and old.rows % size == 0 and old.cols % size == 0)
            restart = not grows
    if restart:
        if prev is not None:
            report.invalidated = f"{prev} -> {stable}"
            run._say(result, f"step {step.name!r}: its settings, inputs or code changed (or its grid left the "
                             "tile lattice); all its tiles are recomputed")
        run.ledger.forget_step(step.name)
        for p in run.products_dir.glob(f"{step.name}__*"):
            p.unlink()
        store = create_store(spath, sp.grid, outputs, layout, attrs=attrs)
    else:
        st = TileStore(spath)
        if old != sp.grid or {k: v.to_dict() for k, v in st.specs.items()} != {k: v.to_dict() for k, v in outputs.items()}:
            if old != sp.grid:
                run._say(result, f"step {step.name!r}: the grid grows from {old.rows} x {old.cols} to "
                                 f"{sp.grid.rows} x {sp.grid.cols} px; finished tiles are moved, not recomputed")
            regrid_store(spath, old, sp.grid, run.options.tile, outputs, layout, attrs,
                         on_moved=lambda di, dj: run.ledger.regrid_step(step.name, old.to_dict(), sp.grid.to_dict(),
                                                                         di, dj))
        store = TileStore(spath)
        for p in store.remove_partials():
            pass
    run.ledger.set_step(step.name, stable, len(sp.tiling), {
        "params": _params_or_free(step), "inputs": dict(step.inputs), "in_keys": sp.in_keys,
        "model": fitted.hash, "model_path": fitted.path,
        "outputs": {k: v.to_dict() for k, v in outputs.items()}, "sources": dict(step.sources),
        "grid": sp.grid.to_dict(), "tile": run.options.tile, "version": sp.version, "incremental": mode})
    return store


def _params_or_free(step: Step) -> Any:
    from .step import params_dump

    try:
        return params_dump(step.params)
    except Exception:  # pragma: no cover - a parameter object that cannot be dumped
        return str(step.params)


# ---------------------------------------------------------------------------------------------------
# one step


def start_invocation(run: "Run") -> None:
    """Record the invocation (its mode and start) in the ledger's campaign history."""
    run.ledger.start_invocation(str(run.options.incremental))


def run_step_incremental(run: "Run", step: Step, executor: "Executor", layout, known: dict,
                         result: "RunResult", mode: str, StepReport: type, _Fitted: type) -> "StepReport":
    """Run ``step`` under per-tile keys (see the module's description); the incremental ``Run._run_step``.

    ``StepReport`` and ``_Fitted`` are the run module's classes (passed in: this module does not
    import the run module, which calls it).
    """
    if mode not in MODES:
        raise IncrementalError(f"incremental mode must be one of {list(MODES)}. Got {mode!r}")
    t_step = time.perf_counter()
    sp = run._plan_step(step, layout, known, result)
    try:
        origin = tile_origin(sp.grid, run.options.tile)
    except ValueError as exc:
        raise IncrementalError(f"step {step.name!r}: an incremental run needs a grid anchored to the tile size: {exc}") from exc
    if step.reader is not None and hasattr(step.params, "line_changes"):
        for e in run.ledger.record_lines(step.params.line_changes()):
            run._say(result, f"campaign: line {e['line']!r} {e['event']}")
    if mode == "refit":
        fitted = _refit(run, step, sp, executor, result, _Fitted, origin)
    else:
        fitted = _frozen_fit(run, step, sp, executor, result, _Fitted)
    outputs = step.resolve_outputs(sp.meta, fitted.model)
    stable, keyed = _stable_key(run, step, sp, fitted, outputs)
    tkeys = _tile_keys(run, step, sp, stable, keyed, fitted, origin)
    report = StepReport(step.name, stable, total=len(sp.tiling), fit=fitted.state)
    store = _open_store_incremental(run, step, sp, stable, outputs, fitted, report, result, mode)
    recorded = run.ledger.tile_keys(step.name)
    pending = [t for t in sp.tiling if recorded.get(t.index) != tkeys[t.index]]
    report.done_before = len(sp.tiling) - len(pending)
    if pending and report.done_before:
        run._say(result, f"step {step.name!r}: {len(pending)} of {len(sp.tiling)} tiles changed: "
                         + ", ".join(t.name for t in pending[:12]) + (" ..." if len(pending) > 12 else ""))
    _compute(run, step, sp, tkeys, outputs, fitted, pending, executor, report)
    if report.complete:
        known[step.name] = (run.store_path(step.name), stable, store)
        _incr_keys(run)[step.name] = {(origin[0] + i, origin[1] + j): k for (i, j), k in tkeys.items()}
    if report.complete and run.options.export:
        product_key = _sha("products", stable, sorted((list(k), v) for k, v in tkeys.items()))
        report.products = run._export(step, product_key, store, outputs, sp.in_keys, fitted.hash, executor, result)
    report.seconds = time.perf_counter() - t_step
    return report


def _compute(run: "Run", step: Step, sp, tkeys: dict, outputs: dict[str, OutputSpec], fitted, pending: list,
             executor: "Executor", report: "StepReport") -> None:
    """Run the kernel on the pending tiles; record each under its own key once it is written."""
    import logging

    spath = run.store_path(step.name)
    tasks = [TileTask(step, t.index, sp.grid, run.options.tile, step.halo, sp.inputs, str(spath), outputs,
                      fitted.path) for t in pending]
    run.progress.start(step.name, len(sp.tiling), report.done_before)
    t0 = time.perf_counter()

    def on_done(task: TileTask, res: dict) -> None:
        run.ledger.mark_tile(step.name, tkeys[task.index], task.index, "done", res.get("seconds", 0.0))
        report.computed += 1
        run.progress.advance(step.name)

    def on_error(task: TileTask, exc: BaseException, tb: str) -> None:
        msg = str(exc) or type(exc).__name__
        run.ledger.mark_tile(step.name, "failed:" + tkeys[task.index], task.index, "failed", error=msg)
        report.failed[task.index] = msg
        logging.getLogger("swathmill").error("%s\n%s", msg, tb)

    executor.map(run_tile, tasks, on_done, on_error)
    run.progress.end(step.name)
    run.ledger.add_timing(step.name, "tiles", time.perf_counter() - t0)


# ---------------------------------------------------------------------------------------------------
# history


def campaign_history(run_dir: Path) -> list[dict]:
    """Per invocation: its mode, time taken, the line events it saw, the tiles each step recomputed and what
    each step's fit did (``fits``: step -> mode, model kept/extended/fitted or, refit, unchanged/changed/new
    with the fit tiles accumulated again)."""
    from .ledger import Ledger

    ledger = Ledger(Path(run_dir) / "ledger.sqlite")
    try:
        events: dict[str, list] = {}
        for e in ledger.campaign():
            events.setdefault(e["invocation"], []).append({"line": e["line"], "event": e["event"]})
        tiles: dict[str, dict[str, list]] = {}
        for h in ledger.history():
            if h["status"] == "done":
                tiles.setdefault(h["invocation"], {}).setdefault(h["name"], []).append([h["i"], h["j"]])
        out = []
        for inv in ledger.invocations():
            out.append({"invocation": inv["invocation"], "mode": inv["mode"], "seconds": inv["seconds"],
                        "finished": inv["finished"] is not None, "lines": events.get(inv["invocation"], []),
                        "tiles": tiles.get(inv["invocation"], {}), "fits": inv["info"].get("fits", {})})
        return out
    finally:
        ledger.close()


def campaign_notes(run_dir: Path) -> list[str]:
    """The campaign's history in sentences, one per incremental invocation (empty for other runs)."""
    if not (Path(run_dir) / "ledger.sqlite").is_file():
        return []
    out = []
    for n, h in enumerate(campaign_history(run_dir), 1):
        events = ", ".join(f"{e['line']} {e['event']}" for e in h["lines"]) or "no line changed"
        tiles = ", ".join(f"{step} {len(t)}" for step, t in h["tiles"].items()) or "none"
        took = f"{h['seconds']:.1f} s" if h["seconds"] is not None else "did not finish"
        fits = "; ".join(_fit_sentence(step, f) for step, f in h["fits"].items())
        out.append(f"Invocation {n} ({h['invocation']}, {h['mode']} models): {events}; tiles recomputed: "
                   f"{tiles}; {took}." + (f" Fits: {fits}." if fits else ""))
    return out


def _fit_sentence(step: str, f: dict) -> str:
    if f.get("mode") == "refit":
        return (f"{step} refitted exactly ({f.get('accumulated')} of {f.get('tiles')} fit tiles accumulated again, "
                f"model {f.get('model')})")
    extra = f", {f['accumulated']} fit tiles read" if "accumulated" in f else ""
    return f"{step} model {f.get('model')}{extra}"
