"""The run configuration: one YAML file, loaded safely, validated into typed objects.

Unknown keys and wrong types fail with the key's path and what was expected. Relative paths are
resolved against the folder of the YAML file.
"""
from __future__ import annotations

import difflib
import hashlib
from pathlib import Path
from typing import Any, Literal

import yaml

from pydantic import BaseModel, Field, ValidationError, field_validator, model_validator

from swathmill.errors import SwathmillError
from swathmill.tiles.paths import resolve as resolve_path
from swathmill.workflows.params import Section, check_ref, ctx_get  # check_ref, ctx_get: re-exported for older imports

__all__ = ["ConfigError", "JobqueueConfig", "ExecutionConfig", "EngineConfig", "load_yaml", "validate", "config_hash",
           "resolve", "check_ref", "ctx_get"]


class ConfigError(SwathmillError, ValueError):
    """The configuration file is unreadable or invalid; the message names the file and the key."""


class JobqueueConfig(Section):
    """A batch cluster through dask-jobqueue (optional extra ``swathmill[batch]``)."""

    system: Literal["slurm", "pbs", "sge", "lsf", "htcondor"] = "slurm"
    jobs: int = Field(1, ge=1, description="number of batch jobs to start")
    cores: int = Field(4, ge=1)
    processes: int = Field(4, ge=1, description="worker processes per job")
    memory: str = "16GiB"
    walltime: str = "04:00:00"
    queue: str | None = None
    account: str | None = None
    worker_lifetime: str | None = Field("3h50m", description="below the wall time, so jobs end cleanly")
    worker_lifetime_stagger: str = "5m"
    local_directory: str | None = None


class ExecutionConfig(Section):
    """Where tasks run. ``local``: an in-process loop; ``dask``: a LocalCluster sized to the machine, or
    the scheduler at ``address``; ``jobqueue``: a batch cluster."""

    executor: Literal["local", "dask", "jobqueue"] = "dask"
    workers: int | None = Field(None, ge=1, description="worker processes (default: one per core)")
    threads_per_worker: int = Field(1, ge=1)
    memory_limit: str = Field("auto", description="per worker, e.g. '4GiB'; 'auto' splits the machine's memory")
    address: str | None = Field(None, description="an existing scheduler, e.g. tcp://127.0.0.1:8786")
    dashboard: str | None = Field("127.0.0.1:0", description="host:port of the dashboard; keep it on 127.0.0.1")
    retries: int = Field(2, ge=0)
    max_in_flight: int | None = Field(None, ge=1, description="tiles in flight at once (default 2 per thread)")
    jobqueue: JobqueueConfig | None = None

    @model_validator(mode="after")
    def _check(self) -> "ExecutionConfig":
        if self.dashboard:
            host = self.dashboard.rsplit(":", 1)[0].strip("[]") if ":" in self.dashboard else self.dashboard
            if host not in ("127.0.0.1", "localhost", "::1"):
                raise ValueError(f"dashboard must be bound to this machine (127.0.0.1, localhost or ::1). Got "
                                 f"{self.dashboard!r}; reach it from elsewhere through an SSH tunnel")
        if self.executor == "jobqueue" and self.jobqueue is None:
            raise ValueError("executor 'jobqueue' needs a 'jobqueue' section")
        return self


class EngineConfig(Section):
    tile: int = Field(512, ge=8, description="tile size in pixels; every store's shard size")
    chunk: int | None = Field(None, ge=8, description="inner chunk size in pixels (divides tile)")
    zstd_level: int = Field(1, ge=0, le=22)
    export: bool = Field(True, description="write COG products and STAC items")
    export_background: bool = Field(True, description="on Dask, write a step's products while the next steps run "
                                                      "(false: before the next step starts)")
    fuse: bool = Field(True, description="steps reading the same input share one read per tile (fused passes)")
    incremental: Literal["off", "frozen", "refit"] = Field(
        "off", description="frozen: a growing campaign recomputes only the tiles its new or re-flown lines "
                           "touch, with the fitted models of the first invocation kept; refit: the same, with "
                           "every fitted model fitted again exactly from kept per-tile accumulator results")

    @field_validator("incremental", mode="before")
    @classmethod
    def _yaml_off(cls, v: Any) -> Any:
        return "off" if v is False else v  # YAML reads a bare `off` as false


def _format_error(err: dict, data: Any, model: type[BaseModel]) -> str:
    loc = [str(p) for p in err["loc"]]
    path = ".".join(loc) or "(top level)"
    if err["type"] == "extra_forbidden":
        parent_fields = _fields_at(model, err["loc"][:-1])
        close = difflib.get_close_matches(loc[-1], parent_fields, n=1)
        hint = f"; did you mean {close[0]!r}?" if close else (f"; allowed keys: {', '.join(parent_fields)}"
                                                               if parent_fields else "")
        return f"{path}: unknown key{hint}"
    got = err.get("input")
    got_s = repr(got) if not isinstance(got, dict) else "a mapping"
    return f"{path}: {err['msg']} (got {got_s})"


def _fields_at(model: type[BaseModel] | None, loc) -> list[str]:
    import typing

    for part in loc:
        if model is None or isinstance(part, int):
            continue
        f = model.model_fields.get(str(part))
        if f is None:
            return []
        ann = f.annotation
        cands = [a for a in typing.get_args(ann) or (ann,) if isinstance(a, type) and issubclass(a, BaseModel)]
        model = cands[0] if cands else None
    return sorted(model.model_fields) if model is not None else []


def load_yaml(path: Path) -> dict:
    path = Path(path)
    try:
        text = path.read_text()
    except FileNotFoundError:
        raise ConfigError(f"configuration file {path} does not exist") from None
    except OSError as exc:
        raise ConfigError(f"cannot read configuration file {path}: {exc}") from None
    try:
        data = yaml.safe_load(text)
    except yaml.YAMLError as exc:
        raise ConfigError(f"{path} is not valid YAML: {exc}") from None
    if not isinstance(data, dict):
        raise ConfigError(f"{path}: the top level must be a mapping of keys. Got {type(data).__name__}")
    return data


def validate(model: type[BaseModel], data: dict, path: Path, context: dict | None = None) -> BaseModel:
    try:
        return model.model_validate(data, context=context)
    except ValidationError as exc:
        lines = [_format_error(e, data, model) for e in exc.errors()]
        raise ConfigError(f"{path}: invalid configuration\n  " + "\n  ".join(lines)) from None


def config_hash(data: dict) -> str:
    import json
    return hashlib.sha256(json.dumps(data, sort_keys=True, default=str).encode()).hexdigest()[:16]


def resolve(base: Path, p: str | Path | None) -> Path | None:
    if p is None:
        return None
    q = resolve_path(base, p)
    return q if Path(p).expanduser().is_absolute() else q.resolve()  # a relative path is normalised
