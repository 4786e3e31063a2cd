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

from pydantic import Field

from tiles.executors import make_executor
from tiles.run import ENGINE_VERSION, PlanError, Run, RunOptions, RunResult
from tiles.step import Step, StepError

from .config import EngineConfig, ExecutionConfig, Strict, config_hash, load_yaml, resolve, validate
from .mnf import MnfConfig, mnf_steps
from .mosaic import MosaicConfig, build_mosaic_step
from .progress import make_progress

__all__ = ["RunConfig", "InputError", "load_run_config", "build_steps", "run_config", "rebuild_report"]

CAUTION = ("Every product is an estimate, with the accuracy measured against the reference samples named in "
           "the report; confirm it in the field and use it under local rules and licensed practice before "
           "any decision (drilling, spraying, water advisories).")


class InputError(ValueError):
    """Input data is missing or unusable; the message names the file, band, tile or key."""


class RunConfig(Strict):
    """The whole run. Relative paths are relative to the YAML file's folder."""

    name: str = Field(..., min_length=1, description="name of the run (used in product ids)")
    run_dir: str | None = Field(None, description="the run directory (default: runs/<name> beside the file)")
    execution: ExecutionConfig = ExecutionConfig()
    engine: EngineConfig = EngineConfig()
    mosaic: MosaicConfig
    mnf: MnfConfig | None = None


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


def build_steps(cfg: RunConfig, base: Path) -> list[Step]:
    """The steps of a run, in order."""
    steps: list[Step] = [build_mosaic_step(cfg.mosaic, base)]
    if cfg.mnf is not None:
        steps += mnf_steps(cfg.mnf, "mosaic/reflectance")
    return steps


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
        steps = build_steps(cfg, base)
    except (StepError, FileNotFoundError, OSError) as exc:
        raise InputError(str(exc)) from None
    chash = config_hash(cfg.model_dump(mode="json", exclude={"execution"}))
    opts = RunOptions(tile=cfg.engine.tile, chunk=cfg.engine.chunk, zstd_level=cfg.engine.zstd_level,
                      export=cfg.engine.export, software_version=ENGINE_VERSION, config_hash=chash)
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
                    result = run.execute(steps, ex)
                except (PlanError, StepError) as exc:
                    raise InputError(str(exc)) from None
                _after_run(run, cfg, result, base, progress)
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


def _after_run(run: Run, cfg: RunConfig, result: RunResult, base: Path, progress) -> None:
    """Products gathered into a STAC collection and the report, when the report module exists."""
    try:
        from .finish import finish_run
    except ImportError:
        return
    finish_run(run, cfg, result, base, progress)


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
    from .finish import rebuild_report as _rebuild
    return _rebuild(Path(run_dir))


