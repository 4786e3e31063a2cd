"""The config-driven pipeline: YAML -> typed config -> steps -> run -> products, STAC, report.

Each family of steps owns its configuration section and its step factory; this module only wires
them in order and runs them in the run directory the configuration names.
"""
from __future__ import annotations

import json
import sys
import time
from pathlib import Path
from typing import Any

import warnings
from dataclasses import dataclass
from typing import Literal

import numpy as np
from pydantic import Field, field_validator

from swathmill.tiles.executors import make_executor
from swathmill.tiles.ops import modal_filter_step
from swathmill.tiles.run import ENGINE_VERSION, PlanError, Run, RunOptions, RunResult
from swathmill.tiles.step import Step, StepError
from swathmill.tiles.store import TileStore

from swathmill.workflows.methods.calibration import CalibrationConfig, CalibrationSamples
from swathmill.workflows.methods.calibration import build_steps as calibration_steps
from swathmill.workflows.methods.classify import SamConfig, SffConfig, SvmConfig
from swathmill.workflows.methods.classify import build_steps as classify_steps
from swathmill.workflows.app.config import EngineConfig, ExecutionConfig, Strict, config_hash, load_yaml, resolve, validate
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
from swathmill.errors import SwathmillError

SPLIT_VALIDATION = 2  # split code of validation samples in swathmill.workflows.inputs.reference

__all__ = ["RunConfig", "InputError", "load_run_config", "build_steps", "run_config", "rebuild_report"]

CAUTION = ("Every product is an estimate, with the accuracy measured against the reference samples named in "
           "the report; confirm it in the field and use it under local rules and licensed practice before "
           "any decision (drilling, spraying, water advisories).")


class InputError(SwathmillError, ValueError):
    """Input data is missing or unusable; the message names the file, band, tile or key."""


class ModalFilterConfig(Strict):
    """Majority filter of class maps (its own step per map, with a halo so tiles leave no seam)."""

    size: int = Field(3, ge=1, description="odd window side in pixels")
    steps: list[str] | None = Field(None, description="class-map steps to filter (default: all)")

    @field_validator("size")
    @classmethod
    def _odd(cls, v: int) -> int:
        if v % 2 == 0:
            raise ValueError(f"size must be odd. Got {v}")
        return v


class ClassifyConfig(Strict):
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


class AccuracyConfig(Strict):
    area_unit: Literal["ha", "km2", "m2"] = Field("ha", description="unit of the area estimates")
    use_unassigned: bool = Field(False, description="also assess on samples with no train/validation split")


class ReportConfig(Strict):
    enabled: bool = True
    title: str | None = None


class RunConfig(Strict):
    """The whole run. Relative paths are relative to the YAML file's folder."""

    name: str = Field(..., min_length=1, description="name of the run (used in product ids)")
    run_dir: str | None = Field(None, description="the run directory (default: runs/<name> beside the file)")
    execution: ExecutionConfig = ExecutionConfig()
    engine: EngineConfig = EngineConfig()
    mosaic: MosaicConfig
    reference: GroundReferenceConfig | None = Field(
        None, description="ground reference: validation samples for accuracy, measurements for calibration")
    mnf: MnfConfig | None = None
    endmembers: EndmemberExtractionConfig | None = None
    classify: ClassifyConfig | None = None
    unmix: UnmixConfig | None = None
    features: FeaturesConfig | None = None
    calibrations: list[CalibrationEntry] = Field(default_factory=list)
    accuracy: AccuracyConfig = AccuracyConfig()
    report: ReportConfig = ReportConfig()


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
    """The steps of a run after the mosaic, and what the accuracy assessment needs to know of them."""

    steps: list[Step]
    class_maps: list[str]  # "step/output" of every class map
    abundance_maps: list[str]
    quantity_maps: dict[str, str]  # "step/output" -> ground-reference property
    calibrations: list[str]


class StoreValid:
    """valid(rows, cols) -> bool per sample, read from the mosaic store (for ground-reference checks)."""

    def __init__(self, store: TileStore):
        self.store = store

    def __call__(self, rows: np.ndarray, cols: np.ndarray) -> np.ndarray:
        rows, cols = np.asarray(rows, dtype=np.int64), np.asarray(cols, dtype=np.int64)
        if rows.size == 0:
            return np.zeros(0, dtype=bool)
        inside = (rows >= 0) & (cols >= 0) & (rows < self.store.grid.rows) & (cols < self.store.grid.cols)
        out = np.zeros(rows.shape, dtype=bool)
        if inside.any():
            vals = self.store.array("valid").get_coordinate_selection((rows[inside], cols[inside]))
            out[inside] = np.asarray(vals).astype(bool)
        return out


def build_mosaic(cfg: RunConfig, base: Path) -> Step:
    return build_mosaic_step(cfg.mosaic, base)


def build_later_steps(cfg: RunConfig, base: Path, mosaic_store: TileStore) -> Plan:
    """The steps after the mosaic, in order. Needs the finished mosaic (its grid and valid mask)."""
    ctx = {"grid": mosaic_store.grid, "base_dir": base, "valid": StoreValid(mosaic_store)}
    steps: list[Step] = []
    class_maps: list[str] = []
    if cfg.mnf is not None:
        steps += mnf_steps(cfg.mnf, "mosaic/reflectance")
    if cfg.endmembers is not None:
        steps += endmember_steps(cfg.endmembers, ctx)
    if cfg.classify is not None:
        cl = cfg.classify
        made = []
        for section in [*cl.sam, *cl.sff, *cl.svm]:
            made += classify_steps(section, ctx)
        steps += made
        class_maps += [f"{s.name}/classes" for s in made]
        if cl.modal_filter is not None:
            wanted = cl.modal_filter.steps
            names = [s.name for s in made]
            unknown = [n for n in (wanted or []) if n not in names]
            if unknown:
                raise InputError(f"classify.modal_filter.steps names {unknown}, which are not class-map steps "
                                 f"of this run ({names})")
            for s in made:
                if wanted is None or s.name in wanted:
                    n_classes = len(s.params.class_names)
                    steps.append(modal_filter_step(f"{s.name}_modal", f"{s.name}/classes", cl.modal_filter.size,
                                                   n_classes=n_classes))
                    class_maps.append(f"{s.name}_modal/output")
    abundance_maps: list[str] = []
    if cfg.unmix is not None and not unmix_needs_transform(cfg):
        made = unmix_steps(cfg.unmix, ctx)
        steps += made
        abundance_maps += [f"{s.name}/abundance" for s in made]
    if cfg.features is not None:
        steps += feature_steps(cfg.features, ctx)
    quantity_maps: dict[str, str] = {}
    calibrations: list[str] = []
    for entry in cfg.calibrations:
        if cfg.reference is None:
            raise InputError(f"calibrations[{entry.name}] needs the top-level 'reference' section (the "
                             "ground reference holding the measured values)")
        samples = calibration_samples(cfg.reference, entry.property, mosaic_store, base)
        section = CalibrationConfig.model_validate(entry.model_dump(exclude={"property"}))
        steps += calibration_steps(section, samples)
        quantity_maps[f"{entry.name}/quantity"] = entry.property
        calibrations.append(entry.name)
    return Plan(steps, class_maps, abundance_maps, quantity_maps, calibrations)


def unmix_needs_transform(cfg: RunConfig) -> bool:
    """Library endmembers unmixing MNF/PCA components: built once that step's model is fitted."""
    u = cfg.unmix
    if u is None or u.endmembers.library is None or cfg.mnf is None:
        return False
    return u.input.split("/")[0] in {s.name for s in mnf_steps(cfg.mnf, "mosaic/reflectance")}


def build_unmix_on_components(cfg: RunConfig, base: Path, run: Run) -> list[Step]:
    """The unmixing step on MNF/PCA components, its library endmembers transformed like the cube."""
    from swathmill.tiles.tasks import load_model

    from swathmill.workflows.methods.unmix import LinearTransform

    src = cfg.unmix.input.split("/")[0]
    info = next((s["info"] for s in run.ledger.steps() if s["name"] == src), None)
    if info is None or not info.get("model_path"):
        raise InputError(f"unmix.input {cfg.unmix.input!r}: step {src!r} has no fitted model in this run")
    model = load_model(info["model_path"])
    k = len(run.known[src][2].specs[cfg.unmix.input.split("/")[1]].bands)
    cube = run.known["mosaic"][2].specs["reflectance"]
    fwhm = cube.coords.get("fwhm")
    from swathmill.workflows.inputs.library import read_library
    from swathmill.workflows.methods.unmix import unmix_step

    lib_path = Path(cfg.unmix.endmembers.library)
    lib = read_library(lib_path if lib_path.is_absolute() else base / lib_path)
    if cfg.unmix.endmembers.materials is not None:
        lib = lib.subset(cfg.unmix.endmembers.materials)
    return [unmix_step(cfg.unmix.name, cfg.unmix.input, method=cfg.unmix.method, library=lib,
                       shade=cfg.unmix.shade, max_condition=cfg.unmix.max_condition, kkt_rtol=cfg.unmix.kkt_rtol,
                       transform=LinearTransform.from_mnf_model(model, k),
                       cube_wavelengths=list(cube.coords["wavelength"]),
                       cube_fwhm=None if fwhm is None or not np.all(np.isfinite(fwhm)) else list(fwhm))]


def calibration_samples(ref: GroundReferenceConfig, prop: str, mosaic_store: TileStore, base: Path) -> CalibrationSamples:
    """Training samples (split train or unassigned) with a finite value of ``prop``."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        table, _issues = load_samples(ref.model_copy(update={"properties": None}), mosaic_store.grid,
                                      base_dir=base, valid=StoreValid(mosaic_store))
    if prop not in table.extras:
        raise InputError(f"ground reference {ref.path}: no numeric column {prop!r} (numeric columns: "
                         f"{sorted(table.extras)})")
    values = table.extras[prop]
    keep = (table.split != SPLIT_VALIDATION) & np.isfinite(values)
    if not keep.any():
        raise InputError(f"ground reference {ref.path}: no training sample has a value of {prop!r}")
    t = table.subset(keep)
    return CalibrationSamples(rows=t.row, cols=t.col, values=t.extras[prop], groups=t.group,
                              ids=[f"feature {f}" for f in t.feature])


def build_steps(cfg: RunConfig, base: Path) -> list[Step]:
    """The first phase of a run: the mosaic. Later steps are built once it is finished."""
    return [build_mosaic(cfg, base)]


def _executor(ex: ExecutionConfig):
    if ex.executor == "local":
        return make_executor("local", retries=0)
    if ex.executor == "dask":
        opts: dict[str, Any] = {"retries": ex.retries, "threads_per_worker": ex.threads_per_worker,
                                "max_in_flight": ex.max_in_flight}
        if ex.address:
            opts["address"] = ex.address
        else:
            opts.update(n_workers=ex.workers, memory_limit=ex.memory_limit, dashboard_address=ex.dashboard)
        return make_executor("dask", **opts)
    jq = ex.jobqueue.model_dump(exclude_none=True)
    return make_executor("jobqueue", retries=ex.retries, **jq)


def run_config(config_path: Path, *, executor: str | None = None, workers: int | None = None,
               address: str | None = None, plain: bool = False, out=None) -> int:
    """Run or resume the run ``config_path`` describes. Returns the process exit code."""
    out = out or sys.stdout
    config_path = Path(config_path).resolve()
    cfg, data = load_run_config(config_path)
    overrides = {k: v for k, v in {"executor": executor, "workers": workers, "address": address}.items() if v}
    if overrides:
        cfg = cfg.model_copy(update={"execution": cfg.execution.model_copy(update=overrides)})
        if address:
            cfg = cfg.model_copy(update={"execution": cfg.execution.model_copy(update={"executor": "dask"})})
    base = config_path.parent
    run_dir = run_dir_of(cfg, config_path)
    try:
        first = build_steps(cfg, base)
    except (StepError, FileNotFoundError, OSError, ValueError) as exc:
        raise InputError(str(exc)) from None
    chash = config_hash(cfg.model_dump(mode="json", exclude={"execution"}))
    opts = RunOptions(tile=cfg.engine.tile, chunk=cfg.engine.chunk, zstd_level=cfg.engine.zstd_level,
                      export=cfg.engine.export, software_version=ENGINE_VERSION, config_hash=chash)
    try:
        opts.layout()
    except ValueError as exc:
        raise InputError(f"{config_path}: engine: {exc}") from None
    progress = make_progress(force_plain=plain)
    t0 = time.perf_counter()
    result: RunResult | None = None
    try:
        with Run(run_dir, opts, progress=progress) as run:
            _freeze_config(run, config_path, cfg)
            ex = _executor(cfg.execution)
            try:
                if getattr(ex, "dashboard", None):
                    progress.message(f"dashboard: {ex.dashboard}")
                try:
                    result = run.execute(first, ex)
                    plan = None
                    if result.ok:
                        write_footprints(first[0], run.dir / "footprints.geojson")
                        try:
                            plan = build_later_steps(cfg, base, run.known["mosaic"][2])
                        except (StepError, FileNotFoundError, OSError, ValueError) as exc:
                            raise InputError(str(exc)) from None
                        more = run.execute(plan.steps, ex)
                        result.steps += more.steps
                        result.messages += more.messages
                        result.stopped_at = more.stopped_at
                        if more.ok and unmix_needs_transform(cfg):
                            try:
                                last = build_unmix_on_components(cfg, base, run)
                            except (StepError, FileNotFoundError, OSError, ValueError) as exc:
                                raise InputError(str(exc)) from None
                            more = run.execute(last, ex)
                            result.steps += more.steps
                            result.messages += more.messages
                            result.stopped_at = more.stopped_at
                            plan.abundance_maps += [f"{s.name}/abundance" for s in last]
                except (PlanError, StepError) as exc:
                    raise InputError(str(exc)) from None
                _after_run(run, cfg, result, plan, base, progress)
            finally:
                ex.close()
    finally:
        progress.close()
    print(f"run directory: {run_dir}", file=out)
    return _summarize(result, time.perf_counter() - t0, run_dir, out)


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


