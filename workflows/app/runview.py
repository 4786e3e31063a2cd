"""A run directory read back from disk, for the steps after a run: assessment, STAC and the report.

:class:`RunView` is what a finished or partial run directory holds (resolved configuration, ledger
rows, stores, models, products); :func:`open_run` reads it. :class:`StoreValid` answers "is this pixel
valid in the mosaic" for ground-reference checks. Outputs are found by their declared role
(:class:`swathmill.workflows.roles.Role`), never by their name.
"""
from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from swathmill.tiles.ledger import Ledger
from swathmill.tiles.step import OutputSpec
from swathmill.tiles.store import TileStore
from swathmill.tiles.tasks import load_model
from swathmill.workflows.roles import Role

__all__ = ["ACCURACY_FILE", "RunView", "open_run", "StoreValid", "is_class_map", "with_role"]

ACCURACY_FILE = "accuracy.json"


@dataclass
class RunView:
    """What a finished or partial run directory holds, read back from disk."""

    dir: Path
    config: dict
    base: Path
    steps: dict[str, dict]  # name -> ledger row (key, total, info)
    done: dict[str, int]

    def store(self, name: str) -> TileStore | None:
        p = self.dir / "stores" / f"{name}.zarr"
        if not (p / "zarr.json").is_file() or name not in self.steps:
            return None
        return TileStore(p)

    def complete(self, name: str) -> bool:
        s = self.steps.get(name)
        return bool(s) and self.done.get(name, 0) == (s["total"] or -1)

    def product(self, name: str, output: str) -> Path | None:
        p = self.dir / "products" / f"{name}__{output}.tif"
        return p if p.is_file() else None

    def model(self, name: str) -> dict | None:
        info = self.steps.get(name, {}).get("info", {})
        mp = info.get("model_path")
        if not mp or not Path(mp + ".json").is_file():
            return None
        return load_model(mp)

    def outputs(self, name: str) -> dict[str, OutputSpec]:
        info = self.steps.get(name, {}).get("info", {})
        return {k: OutputSpec.from_dict(v) for k, v in (info.get("outputs") or {}).items()}


def open_run(run_dir: Path) -> RunView:
    """Read a run directory; FileNotFoundError names what is missing when it is not one."""
    run_dir = Path(run_dir).resolve()
    resolved = run_dir / "config.resolved.json"
    if not (run_dir / "ledger.sqlite").is_file() or not resolved.is_file():
        raise FileNotFoundError(f"{run_dir} is not a swathmill run directory (ledger.sqlite or "
                                "config.resolved.json missing)")
    config = json.loads(resolved.read_text())
    ledger = Ledger(run_dir / "ledger.sqlite")
    try:
        steps = {s["name"]: s for s in ledger.steps()}
        done = {n: len(ledger.done(n, s["key"])) for n, s in steps.items()}
    finally:
        ledger.close()
    return RunView(run_dir, config, Path(config["config_file"]).parent, steps, done)


def with_role(specs: dict[str, OutputSpec], role: Role | str) -> list[str]:
    """Names of the outputs declaring ``role``, in declaration order."""
    return [name for name, spec in specs.items() if spec.role == role]


def is_class_map(spec: OutputSpec) -> bool:
    """A class map: an output declaring :attr:`Role.CLASS_MAP`, categorical, with its class names."""
    return spec.role == Role.CLASS_MAP and spec.kind == "categorical" and bool(spec.class_names)


class StoreValid:
    """valid(rows, cols) -> bool per sample, read from the mosaic store (for ground-reference checks)."""

    def __init__(self, store: TileStore):
        self.store = store

    def __call__(self, rows: np.ndarray, cols: np.ndarray) -> np.ndarray:
        rows, cols = np.asarray(rows, dtype=np.int64), np.asarray(cols, dtype=np.int64)
        if rows.size == 0:
            return np.zeros(0, dtype=bool)
        inside = self.store.grid.full.contains(rows, cols)
        out = np.zeros(rows.shape, dtype=bool)
        if inside.any():
            vals = self.store.array("valid").get_coordinate_selection((rows[inside], cols[inside]))
            out[inside] = np.asarray(vals).astype(bool)
        return out
