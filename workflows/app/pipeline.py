"""The config-driven pipeline: YAML -> typed config -> steps -> run -> products, STAC, report.

Each family of steps owns its configuration section and its step factory; this module only wires
them in order and runs them in the run directory the configuration names.
"""
from __future__ import annotations

import json
import shutil
import sys
import time
from pathlib import Path
from typing import Any

import warnings
from dataclasses import dataclass, field
from typing import Literal

import numpy as np
from pydantic import Field, field_validator

from swathmill.tiles.executors import make_executor
from swathmill.tiles.grid import Grid, Tiling
from swathmill.tiles.ops import modal_filter_step
from swathmill.tiles.run import ENGINE_VERSION, PlanError, Run, RunOptions, RunResult
from swathmill.tiles.step import Step, StepError
from swathmill.tiles.store import TileStore

from swathmill.workflows.methods.bandselect import BandSelectionConfig
from swathmill.workflows.methods.bandselect import build_steps as band_selection_steps
from swathmill.workflows.methods.calibration import CalibrationConfig, CalibrationSamples
from swathmill.workflows.methods.calibration import build_steps as calibration_steps
from swathmill.workflows.methods.classify import SamConfig, SffConfig, SvmConfig
from swathmill.workflows.methods.classify import LEGEND_FILE, Legend, load_section_references, run_legend
from swathmill.workflows.methods.classify import build_steps as classify_steps
from swathmill.workflows.app.config import EngineConfig, ExecutionConfig, config_hash, load_yaml, resolve, validate
from swathmill.workflows.app.runview import StoreValid
from swathmill.workflows.methods.endmembers import EndmemberExtractionConfig
from swathmill.workflows.methods.endmembers import build_steps as endmember_steps
from swathmill.workflows.methods.features import FeaturesConfig
from swathmill.workflows.methods.features import build_steps as feature_steps
from swathmill.workflows.methods.mnf import MnfConfig, mnf_steps
from swathmill.workflows.methods.mosaic import MosaicConfig, build_mosaic_step, write_footprints
from swathmill.workflows.app.progress import make_progress
from swathmill.workflows.inputs.reference import GroundReferenceConfig, load_samples
from swathmill.workflows.methods.unmix import UnmixConfig
from swathmill.workflows.methods.unmix import build_steps as unmix_steps
from swathmill.workflows.methods.rtm.step import CanopyConfig
from swathmill.workflows.methods.rtm.step import build_steps as canopy_steps
from swathmill.errors import SwathmillError
from swathmill.workflows.params import Section

__all__ = ["RunConfig", "InputError", "DiskSpaceError", "load_run_config", "build_steps", "run_config",
           "rebuild_report", "plan_config", "estimate_run", "check_disk"]

class InputError(SwathmillError, ValueError):
    """Input data is missing or unusable; the message names the file, band, tile or key."""


class DiskSpaceError(SwathmillError, ValueError):
    """The run would not fit on the disk of its run directory; the message gives the figures."""


class ModalFilterConfig(Section):
    """Majority filter of class maps (its own step per map, with a halo so tiles leave no seam)."""

    size: int = Field(3, ge=1, description="odd window side in pixels")
    steps: list[str] | None = Field(None, description="class-map steps to filter (default: all)")

    @field_validator("size")
    @classmethod
    def _odd(cls, v: int) -> int:
        if v % 2 == 0:
            raise ValueError(f"size must be odd. Got {v}")
        return v


class ClassifyConfig(Section):
    """Classification steps; each key takes one section or a list of them (distinct ``name`` s)."""

    sam: list[SamConfig] = Field(default_factory=list)
    sff: list[SffConfig] = Field(default_factory=list)
    svm: list[SvmConfig] = Field(default_factory=list)
    modal_filter: ModalFilterConfig | None = None

    @field_validator("sam", "sff", "svm", mode="before")
    @classmethod
    def _listify(cls, v: Any) -> Any:
        return [v] if isinstance(v, dict) else v


class CalibrationEntry(CalibrationConfig):
    """A calibration plus the ground-reference column holding the measured quantity."""

    property: str = Field(..., description="numeric column of the ground reference with the measurements")


class AccuracyConfig(Section):
    area_unit: Literal["ha", "km2", "m2"] = Field("ha", description="unit of the area estimates")
    use_unassigned: bool = Field(False, description="also assess on samples with no train/validation split")


class ReportConfig(Section):
    enabled: bool = True
    title: str | None = None


class RunConfig(Section):
    """The whole run. Relative paths are relative to the YAML file's folder."""

    name: str = Field(..., min_length=1, description="name of the run (used in product ids)")
    run_dir: str | None = Field(None, description="the run directory (default: runs/<name> beside the file)")
    execution: ExecutionConfig = ExecutionConfig()
    engine: EngineConfig = EngineConfig()
    mosaic: MosaicConfig
    reference: GroundReferenceConfig | None = Field(
        None, description="ground reference: validation samples for accuracy, measurements for calibration")
    mnf: MnfConfig | None = None
    band_selection: list[BandSelectionConfig] = Field(
        default_factory=list, description="band selections (one section or a list); input of later steps as "
                                          "'<name>/selected'")
    endmembers: EndmemberExtractionConfig | None = None
    classify: ClassifyConfig | None = None
    unmix: UnmixConfig | None = None
    features: FeaturesConfig | None = None
    canopy: CanopyConfig | None = Field(None, description="leaf and canopy properties by model inversion")
    calibrations: list[CalibrationEntry] = Field(default_factory=list)
    accuracy: AccuracyConfig = AccuracyConfig()
    report: ReportConfig = ReportConfig()

    @field_validator("band_selection", mode="before")
    @classmethod
    def _listify_band_selection(cls, v: Any) -> Any:
        return [v] if isinstance(v, dict) else v


def load_run_config(path: Path) -> tuple[RunConfig, dict]:
    """Load and validate a run configuration. ``execution`` may name a profile file (see configs/)."""
    path = Path(path)
    data = load_yaml(path)
    ex = data.get("execution")
    if isinstance(ex, str):
        prof = resolve(path.resolve().parent, ex)
        pdata = load_yaml(prof)
        data = {**data, "execution": validate(ExecutionConfig, pdata.get("execution", pdata), prof).model_dump()}
    return validate(RunConfig, data, path), data


def run_dir_of(cfg: RunConfig, config_path: Path) -> Path:
    base = Path(config_path).resolve().parent
    return resolve(base, cfg.run_dir) if cfg.run_dir else base / "runs" / cfg.name


@dataclass
class Plan:
    """The whole run, built before anything runs: every step in order, from the mosaic on.

    ``rows()`` lists each step's inputs, its outputs (where they are known before fitting), whether it
    fits a model first, and its tiles on the mosaic's grid.
    """

    steps: list[Step]
    grid: Grid
    tile: int
    calibrations: list[str] = field(default_factory=list)
    legend: Legend | None = None  # the run's one legend of class codes, names and colours (with classifiers)

    def rows(self) -> list[dict]:
        """One JSON-able row per step: name, inputs, outputs (None until fitted), fit, tiles."""
        out = []
        for s in self.steps:
            try:
                tiles = len(Tiling(self.grid, self.tile, s.halo))
            except ValueError:
                tiles = None  # the engine refuses this tiling when the step runs, naming the step
            out.append({"step": s.name, "inputs": dict(s.inputs),
                        "outputs": None if callable(s.outputs) else list(s.outputs),
                        "fit": s.fit is not None, "tiles": tiles})
        return out

    def write(self, path: Path) -> None:
        """The plan as JSON (``plan.json`` in the run directory)."""
        path.write_text(json.dumps({"grid": self.grid.to_dict(), "tile": self.tile, "steps": self.rows()},
                                   indent=1, default=str))


def build_mosaic(cfg: RunConfig, base: Path) -> Step:
    # the grid is anchored to the tile size unless the section says otherwise: tile indices then stay
    # put as the campaign grows (swathmill.tiles.incremental)
    section = cfg.mosaic if cfg.mosaic.anchor else cfg.mosaic.model_copy(update={"anchor": cfg.engine.tile})
    return build_mosaic_step(section, base)


def build_plan(cfg: RunConfig, base: Path) -> Plan:
    """Every step of the run, built from the mosaic plan's grid before anything runs."""
    mosaic = build_mosaic(cfg, base)
    later = build_later_steps(cfg, base, mosaic.grid)
    return Plan([mosaic, *later.steps], mosaic.grid, cfg.engine.tile, later.calibrations, legend=later.legend)


def _classify_steps(cl: ClassifyConfig, ctx: dict, reference: GroundReferenceConfig | None = None) -> list[Step]:
    """The classifiers, then a modal filter of each class map the configuration names (default: all).

    The run's one legend is built first from every section's library or ground reference and the
    run's validation reference (``ctx["legend"]``), so every class map shares its codes and colours.
    """
    sections = [*cl.sam, *cl.sff, *cl.svm]
    loaded = [(section, load_section_references(section, ctx)) for section in sections]
    ctx["legend"] = run_legend(loaded, _reference_classes(reference, ctx))
    made: list[Step] = []
    for section, refs in loaded:
        made += classify_steps(section, ctx, refs)
    steps = list(made)
    if cl.modal_filter is not None:
        wanted = cl.modal_filter.steps
        names = [s.name for s in made]
        unknown = [n for n in (wanted or []) if n not in names]
        if unknown:
            raise InputError(f"classify.modal_filter.steps names {unknown}, which are not class-map steps "
                             f"of this run ({names})")
        for s in made:
            if wanted is None or s.name in wanted:
                steps.append(modal_filter_step(f"{s.name}_modal", f"{s.name}/classes", cl.modal_filter.size,
                                               n_classes=len(ctx["legend"].names)))
    return steps


def _reference_classes(reference: GroundReferenceConfig | None, ctx: dict) -> list[str]:
    """Class names of the run's validation reference (for the legend); none without one."""
    if reference is None:
        return []
    if reference.classes:
        return list(reference.classes)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # its issues are reported by the accuracy assessment
        table, _issues = load_samples(reference, ctx["grid"], base_dir=ctx.get("base_dir"), valid=ctx.get("valid"))
    return list(table.class_names)


def build_later_steps(cfg: RunConfig, base: Path, grid: Grid | TileStore) -> Plan:
    """The steps after the mosaic, in order, on the mosaic's grid (``grid``; a finished mosaic store is
    also taken, and then its valid mask drops ground-reference samples on nodata at build time)."""
    store = grid if isinstance(grid, TileStore) else None
    grid = store.grid if store is not None else grid
    ctx = {"grid": grid, "base_dir": base, "valid": StoreValid(store) if store is not None else None}
    steps: list[Step] = []
    if cfg.mnf is not None:
        steps += mnf_steps(cfg.mnf, "mosaic/reflectance")
    for section in cfg.band_selection:
        steps += band_selection_steps(section, ctx)
    if cfg.endmembers is not None:
        steps += endmember_steps(cfg.endmembers, ctx)
    if cfg.classify is not None:
        steps += _classify_steps(cfg.classify, ctx, cfg.reference)
    if cfg.unmix is not None:  # on MNF/PCA components it takes their transform from their metadata
        steps += unmix_steps(cfg.unmix, ctx)
    if cfg.features is not None:
        steps += feature_steps(cfg.features, ctx)
    if cfg.canopy is not None:
        steps += canopy_steps(cfg.canopy, ctx, lines=[resolve(base, p) for p in cfg.mosaic.lines])
    calibrations: list[str] = []
    for entry in cfg.calibrations:
        if cfg.reference is None:
            raise InputError(f"calibrations[{entry.name}] needs the top-level 'reference' section (the "
                             "ground reference holding the measured values)")
        samples = calibration_samples(cfg.reference, entry.property, store if store is not None else grid, base)
        section = CalibrationConfig.model_validate(entry.model_dump(exclude={"property"}))
        steps += calibration_steps(section, samples)
        calibrations.append(entry.name)
    return Plan(steps, grid, cfg.engine.tile, calibrations, legend=ctx.get("legend"))


def calibration_samples(ref: GroundReferenceConfig, prop: str, grid: Grid | TileStore, base: Path) -> CalibrationSamples:
    """Training samples (split train or unassigned) with a finite value of ``prop``.

    ``grid`` is the mosaic's grid (at plan time: samples on nodata are dropped by the fit, which gathers
    only valid pixels), or the finished mosaic store (its valid mask drops them here).
    """
    store = grid if isinstance(grid, TileStore) else None
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        table, _issues = load_samples(ref.model_copy(update={"properties": None}),
                                      store.grid if store is not None else grid, base_dir=base,
                                      valid=StoreValid(store) if store is not None else None)
    if prop not in table.extras:
        raise InputError(f"ground reference {ref.path}: no numeric column {prop!r} (numeric columns: "
                         f"{sorted(table.extras)})")
    values = table.extras[prop]
    keep = ~table.is_validation & np.isfinite(values)
    if not keep.any():
        raise InputError(f"ground reference {ref.path}: no training sample has a value of {prop!r}")
    t = table.subset(keep)
    return CalibrationSamples(rows=t.row, cols=t.col, values=t.extras[prop], groups=t.group,
                              ids=[f"feature {f}" for f in t.feature])


def build_steps(cfg: RunConfig, base: Path) -> list[Step]:
    """Every step of the run, in order (the steps of :func:`build_plan`)."""
    return build_plan(cfg, base).steps


def _executor(ex: ExecutionConfig, scratch: Path | None = None):
    if ex.executor == "local":
        return make_executor("local", retries=0)
    if ex.executor == "dask":
        opts: dict[str, Any] = {"retries": ex.retries, "threads_per_worker": ex.threads_per_worker,
                                "max_in_flight": ex.max_in_flight}
        if ex.address:
            opts["address"] = ex.address
        else:
            opts.update(n_workers=ex.workers, memory_limit=ex.memory_limit, dashboard_address=ex.dashboard,
                        local_directory=str(scratch) if scratch else None)
        return make_executor("dask", **opts)
    jq = ex.jobqueue.model_dump(exclude_none=True)
    return make_executor("jobqueue", retries=ex.retries, **jq)


def run_config(config_path: Path, *, executor: str | None = None, workers: int | None = None,
               address: str | None = None, plain: bool = False, disk_check: bool = True, out=None) -> int:
    """Run or resume the run ``config_path`` describes. Returns the process exit code.

    ``disk_check=False`` runs even when the plan's estimate of the disk needed (which errs on the safe
    side: no compression counted without a probe) exceeds the free space."""
    out = out or sys.stdout
    config_path = Path(config_path).resolve()
    cfg, base, run_dir, plan = _planned(config_path, executor=executor, workers=workers, address=address)
    chash = config_hash(cfg.model_dump(mode="json", exclude={"execution"}))
    opts = _run_options(cfg, config_path, chash)
    est = estimate_run(cfg, base, plan, opts)
    if disk_check:
        check_disk(est, run_dir)
    progress = make_progress(force_plain=plain)
    t0 = time.perf_counter()
    result: RunResult | None = None
    try:
        with Run(run_dir, opts, progress=progress) as run:
            _freeze_config(run, config_path, cfg)
            plan.write(run.dir / "plan.json")
            if plan.legend is not None:
                plan.legend.write_csv(run.dir / LEGEND_FILE)
            _save_estimate(run.dir / "estimate.json", est)
            ex = _executor(cfg.execution, run.dir / "dask-scratch")  # Dask's scratch space inside the run
            try:
                if getattr(ex, "dashboard", None):
                    progress.message(f"dashboard: {ex.dashboard}")
                result = _execute(run, plan, cfg, base, ex)
                _after_run(run, cfg, result, plan, base, progress)
            finally:
                ex.close()
    finally:
        progress.close()
    print(f"run directory: {run_dir}", file=out)
    return _summarize(result, time.perf_counter() - t0, run_dir, out)


def _run_options(cfg: RunConfig, config_path: Path, chash: str = "") -> RunOptions:
    """The engine options of a run: tile layout, fusion and the memory one running task may hold."""
    workers, threads, limit = _slots(cfg.execution)
    opts = RunOptions(tile=cfg.engine.tile, chunk=cfg.engine.chunk, zstd_level=cfg.engine.zstd_level,
                      export=cfg.engine.export, export_background=cfg.engine.export_background,
                      software_version=ENGINE_VERSION, config_hash=chash,
                      fuse=cfg.engine.fuse, task_memory=(limit // threads) if limit else None,
                      incremental=None if cfg.engine.incremental == "off" else cfg.engine.incremental)
    try:
        opts.layout()
    except ValueError as exc:
        raise InputError(f"{config_path}: engine: {exc}") from None
    return opts


def _slots(ex: ExecutionConfig) -> tuple[int, int, int | None]:
    """Workers, threads per worker and memory per worker (bytes) the execution section gives."""
    import os

    import psutil

    if ex.executor == "local":
        return 1, 1, None
    if ex.executor == "jobqueue" and ex.jobqueue is not None:
        from dask.utils import parse_bytes
        jq = ex.jobqueue
        return jq.jobs * jq.processes, max(1, jq.cores // jq.processes), parse_bytes(jq.memory) // jq.processes
    threads = ex.threads_per_worker
    workers = ex.workers or max(1, (os.cpu_count() or 1) // threads)
    if ex.address:
        return workers, threads, None
    if ex.memory_limit == "auto":
        return workers, threads, psutil.virtual_memory().total // workers
    from dask.utils import parse_bytes
    return workers, threads, parse_bytes(ex.memory_limit)


def _line_bytes(cfg: RunConfig, base: Path) -> int:
    from swathmill.workflows.app.config import resolve as _resolve
    total = 0
    for ln in cfg.mosaic.lines:
        p = _resolve(base, ln)
        total += p.stat().st_size if p is not None and p.is_file() else 0
    return total


def estimate_run(cfg: RunConfig, base: Path, plan: Plan, opts: RunOptions, probed: dict | None = None):
    """The planner's estimate of the run (``tiles.plan.estimate``) for this configuration."""
    from swathmill.tiles.plan import estimate

    workers, threads, limit = _slots(cfg.execution)
    return estimate(plan.steps, tile=opts.tile, layout=opts.layout(), grid=plan.grid,
                    reader_bytes={plan.steps[0].name: _line_bytes(cfg, base)}, workers=workers, threads=threads,
                    memory_limit=limit, fuse=opts.fuse, export=opts.export, probed=probed)


def _used_bytes(run_dir: Path) -> dict[str, int]:
    """Bytes already on disk per step store and product of a run directory (resumed work needs no more)."""
    used: dict[str, int] = {}
    for sub, sep in (("stores", ".zarr"), ("products", "__")):
        d = run_dir / sub
        if not d.is_dir():
            continue
        for p in d.iterdir():
            name = p.name.split(sep)[0]
            size = sum(f.stat().st_size for f in p.rglob("*") if f.is_file()) if p.is_dir() else p.stat().st_size
            used[name] = used.get(name, 0) + size
    return used


def check_disk(est, run_dir: Path) -> None:
    """Refuse the run (exit 2) when what it still has to write exceeds the free space of its disk."""
    import shutil as _shutil

    from swathmill.tiles.plan import format_bytes

    used = _used_bytes(run_dir)
    need = sum(max(0, s.disk + s.products - used.get(s.step, 0)) for s in est.steps)
    where = Path(run_dir)
    while not where.exists():
        where = where.parent
    free = _shutil.disk_usage(where).free
    if need > free:
        raise DiskSpaceError(
            f"run directory {run_dir}: the run needs about {format_bytes(need)} more on disk (stores and products, "
            f"estimated; {format_bytes(sum(used.values()))} already written) but {where} has "
            f"{format_bytes(free)} free. Free space, choose another run_dir, or see `swathmill plan` for the "
            "figures per step")


def _save_estimate(path: Path, est, probed: bool = False) -> None:
    d = est.to_dict()
    d["probe"] = probed
    d["written"] = time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())
    path.write_text(json.dumps(d, indent=1, default=str))


def plan_config(config_path: Path, *, as_json: bool = False, probe: bool = False, probe_tiles: int = 4,
                save: bool = False, executor: str | None = None, workers: int | None = None, out=None) -> int:
    """``swathmill plan``: the estimate of a run, without running it (``probe``: time a few tiles of each
    step in a scratch folder inside the run directory, removed afterwards; ``save``: keep the estimate as
    ``estimate-plan.json`` in the run directory for the report). Returns the exit code."""
    from swathmill.tiles.plan import probe as run_probe

    out = out or sys.stdout
    config_path = Path(config_path).resolve()
    cfg, base, run_dir, plan = _planned(config_path, executor=executor, workers=workers)
    opts = _run_options(cfg, config_path)
    probed = None
    if probe:
        scratch = run_dir / f"plan-probe-{time.time_ns()}"
        made = [d for d in (run_dir, *run_dir.parents) if not d.exists()]  # folders the probe creates
        ex = None
        try:
            # on the run's own Dask workers (a local cluster or a given scheduler), so that the times include
            # their contention for the machine; a batch-queue cluster is not started for a plan
            if cfg.execution.executor == "dask":
                ex = _executor(cfg.execution, scratch.with_name(scratch.name + "-workers"))
            probed = run_probe(plan.steps, scratch, tile=opts.tile, layout=opts.layout(), n_tiles=probe_tiles,
                               executor=ex)
        except (StepError, ValueError) as exc:
            raise InputError(str(exc)) from None
        finally:
            if ex is not None:
                ex.close()
            shutil.rmtree(scratch.with_name(scratch.name + "-workers"), ignore_errors=True)
            for d in made:  # deepest first: leave no empty folder behind
                if d.is_dir() and not any(d.iterdir()):
                    d.rmdir()
    est = estimate_run(cfg, base, plan, opts, probed)
    if save:
        run_dir.mkdir(parents=True, exist_ok=True)
        _save_estimate(run_dir / "estimate-plan.json", est, probed=probe)
    if as_json:
        d = est.to_dict()
        d["probe"] = probe
        d["run_dir"] = str(run_dir)
        print(json.dumps(d, indent=1, default=str), file=out)
    else:
        print(f"plan of {config_path.name}: grid {plan.grid.rows} x {plan.grid.cols} px, tiles of {opts.tile} px, "
              f"run directory {run_dir}", file=out)
        for line in est.lines():
            print(line, file=out)
        if not probe:
            print("sizes on disk assume no compression and no time is estimated; --probe runs a few tiles of each "
                  "step to measure both", file=out)
    return 0


def _planned(config_path: Path, **overrides: Any) -> tuple[RunConfig, Path, Path, Plan]:
    """The configuration (with the command line's execution overrides), its folder, its run directory
    and its plan; a plan that cannot be built is an input error."""
    cfg, _data = load_run_config(config_path)
    cfg = _with_overrides(cfg, **overrides)
    try:
        plan = build_plan(cfg, config_path.parent)
    except (StepError, FileNotFoundError, OSError, ValueError) as exc:
        raise InputError(str(exc)) from None
    return cfg, config_path.parent, run_dir_of(cfg, config_path), plan


def _with_overrides(cfg: RunConfig, **overrides: Any) -> RunConfig:
    """The configuration with the command line's execution overrides (an address implies Dask)."""
    overrides = {k: v for k, v in overrides.items() if v}
    if overrides:
        cfg = cfg.model_copy(update={"execution": cfg.execution.model_copy(update=overrides)})
        if overrides.get("address"):
            cfg = cfg.model_copy(update={"execution": cfg.execution.model_copy(update={"executor": "dask"})})
    return cfg


def _execute(run: Run, plan: Plan, cfg: RunConfig, base: Path, ex) -> RunResult:
    """Every step of the plan in one call; the mosaic's footprints once it is finished."""
    try:
        result = run.execute(plan.steps, ex)
        if "mosaic" in run.known:
            write_footprints(plan.steps[0], run.dir / "footprints.geojson")
    except (PlanError, StepError) as exc:
        raise InputError(str(exc)) from None
    return result


def _freeze_config(run: Run, config_path: Path, cfg: RunConfig) -> None:
    text = config_path.read_text()
    (run.dir / "config.yaml").write_text(text)
    (run.dir / "logs" / f"config-{run.invocation}.yaml").write_text(text)
    (run.dir / "config.resolved.json").write_text(json.dumps(
        {"config_file": str(config_path), **cfg.model_dump(mode="json")}, indent=2))


def _after_run(run: Run, cfg: RunConfig, result: RunResult, plan: Plan | None, base: Path, progress) -> None:
    """Accuracy assessment, the STAC collection of the products, and the report."""
    from swathmill.workflows.app.finish import finish_run

    finish_run(run, cfg, result, plan, base, progress)


def _summarize(result: RunResult | None, seconds: float, run_dir: Path, out) -> int:
    if result is None:
        return 1
    failed = [(s.name, idx, err) for s in result.steps for idx, err in s.failed.items()]
    for s in result.steps:
        print(f"  {s.name}: {s.done_before + s.computed}/{s.total} tiles"
              f"{f' ({s.done_before} resumed)' if s.done_before else ''}"
              f"{f', {len(s.failed)} failed' if s.failed else ''}", file=out)
    if failed:
        print(f"{len(failed)} tile(s) failed; finished tiles are kept, run the same command again to resume:",
              file=out)
        for name, idx, err in failed[:50]:
            print(f"  {name} tile {idx}: {err}", file=out)
        return 1
    if not result.ok:
        print(f"stopped at step {result.stopped_at!r}", file=out)
        return 1
    report = run_dir / "report.html"
    print(f"finished in {seconds:.1f}s", file=out)
    if report.is_file():
        print(f"report: {report}", file=out)
    return 0


def rebuild_report(run_dir: Path) -> Path:
    from swathmill.workflows.app.finish import rebuild_report as _rebuild
    return _rebuild(Path(run_dir))


