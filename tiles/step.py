"""Step declarations: what a step reads, what it makes, and the pure numpy functions that do it.

The engine only ever looks at these fields. A step's kernel is a pure function on numpy blocks; it
never opens files. A step may have a fit phase, a mergeable accumulator run over the whole mosaic
before any tile is written.
"""
from __future__ import annotations

import dataclasses
import hashlib
import json
from dataclasses import dataclass, field
from typing import Any, Callable, Literal, Mapping, Protocol

import numpy as np

from .grid import Grid, Tile
from ..errors import SwathmillError

__all__ = ["OutputSpec", "InputMeta", "Block", "Fit", "Step", "Model", "StepError", "canonical_json", "params_dump",
           "ACQUISITION_ATTRS", "acquisition_span"]

Model = dict  # str -> numpy array | JSON-able value; saved as JSON plus npz


class StepError(SwathmillError, ValueError):
    """A step was declared or called wrongly; the message names the step and the key at fault."""


@dataclass(frozen=True)
class OutputSpec:
    """One output array of a step: a (band, y, x) raster.

    kind: "continuous" (average overviews) or "categorical" (class map: mode overviews, colour table).
    role: what the output is for, in the vocabulary of the code that declares the step (the engine only
          stores it: in the store's attributes, the COG's tags and the STAC item); readers of a run
          find outputs by role, never by name.
    class_names: for categorical outputs, names of classes 1..n (0 is "unclassified" / nodata).
    colors: optional RGB triplets (0-255) for classes 1..n.
    attrs: free attributes stored with the array (e.g. {"wavelength": [...], "scale_factor": 1e-4}).
    coords: per-band coordinates (name -> list of len(bands)), e.g. {"wavelength": [...]}.
    product: whether this output is exported as a COG product.
    """

    bands: tuple[str, ...]
    dtype: str
    nodata: float | int
    kind: Literal["continuous", "categorical"] = "continuous"
    role: str = "data"
    class_names: tuple[str, ...] | None = None
    colors: tuple[tuple[int, int, int], ...] | None = None
    coords: Mapping[str, tuple] = field(default_factory=dict)
    attrs: Mapping[str, Any] = field(default_factory=dict)
    product: bool = True

    def __post_init__(self) -> None:
        if not self.bands:
            raise StepError("an output needs at least one band")
        if len(set(self.bands)) != len(self.bands):
            raise StepError(f"band names must be unique. Got {list(self.bands)}")
        np.dtype(self.dtype)
        for k, v in self.coords.items():
            if len(v) != len(self.bands):
                raise StepError(f"coordinate {k!r} has {len(v)} values for {len(self.bands)} bands")

    def to_dict(self) -> dict:
        return {
            "bands": list(self.bands), "dtype": self.dtype, "nodata": _jsonable(self.nodata), "kind": self.kind,
            "role": self.role,
            "class_names": list(self.class_names) if self.class_names else None,
            "colors": [list(c) for c in self.colors] if self.colors else None,
            "coords": {k: [_jsonable(x) for x in v] for k, v in self.coords.items()},
            "attrs": {k: _jsonable(v) for k, v in self.attrs.items()},
            "product": self.product,
        }

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> "OutputSpec":
        return cls(
            bands=tuple(d["bands"]), dtype=d["dtype"], nodata=d["nodata"], kind=d.get("kind", "continuous"),
            role=d.get("role", "data"),
            class_names=tuple(d["class_names"]) if d.get("class_names") else None,
            colors=tuple(tuple(c) for c in d["colors"]) if d.get("colors") else None,
            coords={k: tuple(v) for k, v in (d.get("coords") or {}).items()},
            attrs=dict(d.get("attrs") or {}), product=d.get("product", True),
        )


@dataclass(frozen=True)
class InputMeta:
    """What a step knows about one of its inputs before it runs: the grid and the output spec."""

    ref: str  # "step/output"
    grid: Grid
    spec: OutputSpec


@dataclass
class Block:
    """What a kernel or an accumulator sees for one tile.

    data: alias -> array (bands, rows, cols) over the padded window. Decoded to float32 with
          nodata set to NaN when the input is decoded (the default), raw otherwise.
    valid: (rows, cols) bool, True where every input is valid.
    tile: the tile (core and padded windows in the grid's pixel coordinates).
    grid: the sub-grid of the padded window (georeferenced).
    params: the step's parameter object (see :attr:`Step.params`).
    static: the step's static data (small arrays or JSON, e.g. sample points).
    meta: alias -> InputMeta of each input.
    decoded: whether ``data`` holds decoded values (False: stored values of a ``decode=False`` step).
    """

    data: dict[str, np.ndarray]
    valid: np.ndarray
    tile: Tile
    grid: Grid
    params: Any
    static: Mapping[str, Any]
    meta: dict[str, InputMeta]
    decoded: bool = True

    @property
    def core_valid(self) -> np.ndarray:
        return self.valid[self.tile.crop]


class Kernel(Protocol):
    def __call__(self, block: Block, model: Model | None) -> dict[str, np.ndarray]: ...


@dataclass(frozen=True)
class Fit:
    """A mergeable accumulator over tiles.

    accumulate(block) -> acc        per tile (over the padded window with ``halo``); small result
    merge(a, b) -> acc              associative; merged pairwise in a tree
    finalize(acc, params, meta) -> Model   on the client; a dict of arrays and JSON-able values
    select(tiles, params) -> tiles  optional: the subset of tiles to fit on (e.g. a seeded sample)
    halo: the halo the accumulator needs (e.g. 1 for neighbour differences)
    points: optional (rows key, cols key) of the step's ``static``: the fit gathers its input at these
            global pixels (sample points). The planner's probe uses it to fit on a few tiles: it moves
            the points onto valid pixels of the probed tiles, for a model of the run's shape.
    """

    accumulate: Callable[[Block], Any]
    merge: Callable[[Any, Any], Any]
    finalize: Callable[[Any, Mapping[str, Any], dict[str, InputMeta]], Model]
    select: Callable[[list[Tile], Mapping[str, Any]], list[Tile]] | None = None
    halo: int = 0
    points: tuple[str, str] | None = None


@dataclass(frozen=True)
class Step:
    """A frozen declaration of one step of a pipeline.

    name: unique within a run, used for its store ``stores/<name>.zarr`` and in the ledger.
    params: the step's parameters as one frozen, typed object (a pydantic model, a frozen dataclass, or
            a mapping for the engine's own generic steps); the kernel, the accumulator and the output
            declaration receive it as it is, and the step key hashes its canonical dump
            (:func:`params_dump`).
    inputs: alias -> "step/output" references of earlier steps' outputs.
    outputs: name -> OutputSpec, or a callable (meta, model, params) -> that mapping when the outputs
             depend on the inputs or the fitted model (e.g. the number of components).
    kernel: pure function (block, model) -> {output name: array (bands, rows, cols) over the padded
            window or the core}. It may also return "valid": (rows, cols) bool.
    halo: pixels of context the kernel needs around each tile.
    fit: optional fit phase run before any tile is written.
    static: small data the kernel and accumulator need (sample points, library spectra); hashed.
    decode: decode inputs to float32 with NaN at nodata (True) or pass raw stored values (False);
            with False the kernel also returns stored values (no scale_factor/add_offset applied).
    reader: optional source of input data instead of stores: (grid of padded window, tile, params,
            static) -> (data dict, valid mask). Used by steps that read outside files (the mosaic).
    grid: for a step with a reader, the output grid (steps with inputs take their inputs' grid).
    sources: for a step with a reader, fingerprints of the files it reads (hashed into the key).
    """

    name: str
    kernel: Kernel
    outputs: Mapping[str, OutputSpec] | Callable[[dict[str, InputMeta], Model | None, Mapping[str, Any]], Mapping[str, OutputSpec]]
    inputs: Mapping[str, str] = field(default_factory=dict)
    params: Any = field(default_factory=dict)
    halo: int = 0
    fit: Fit | None = None
    static: Mapping[str, Any] = field(default_factory=dict)
    decode: bool = True
    reader: Callable[..., tuple[dict[str, np.ndarray], np.ndarray]] | None = None
    grid: Grid | None = None
    sources: Mapping[str, str] = field(default_factory=dict)
    version: str = "1"

    def __post_init__(self) -> None:
        if not self.name or "/" in self.name or not self.name.replace("_", "").replace("-", "").isalnum():
            raise StepError(f"step name must be letters, digits, '_' or '-'. Got {self.name!r}")
        if self.reader is None and not self.inputs:
            raise StepError(f"step {self.name!r} has neither inputs nor a reader")
        if self.reader is not None and self.grid is None:
            raise StepError(f"step {self.name!r} has a reader but no output grid")
        for alias, ref in self.inputs.items():
            if ref.count("/") != 1:
                raise StepError(f"step {self.name!r}: input {alias!r} must be 'step/output'. Got {ref!r}")
        if self.halo < 0:
            raise StepError(f"step {self.name!r}: halo must be >= 0. Got {self.halo}")

    def resolve_outputs(self, meta: dict[str, InputMeta], model: Model | None) -> dict[str, OutputSpec]:
        outs = self.outputs(meta, model, self.params) if callable(self.outputs) else self.outputs
        outs = dict(outs)
        if not outs:
            raise StepError(f"step {self.name!r} declares no output")
        span = acquisition_span(m.spec for m in meta.values())
        if span is not None:
            # a product is as old as the data it is made of: outputs that state no acquisition time of
            # their own inherit the span of their inputs
            outs = {k: v if ACQUISITION_ATTRS[0] in v.attrs else dataclasses.replace(
                        v, attrs={**v.attrs, ACQUISITION_ATTRS[0]: span[0], ACQUISITION_ATTRS[1]: span[1]})
                    for k, v in outs.items()}
        return outs

    def describe(self) -> dict:
        """The JSON-able identity of the step (without its model and inputs' keys)."""
        return {
            "name": self.name,
            "version": self.version,
            "kernel": f"{self.kernel.__module__}.{self.kernel.__qualname__}",
            "params": params_dump(self.params),
            "inputs": dict(self.inputs),
            "halo": self.halo,
            "decode": self.decode,
            "static": hash_static(self.static),
            "sources": dict(self.sources),
            "grid": self.grid.to_dict() if self.grid else None,
            "outputs": None if callable(self.outputs) else {k: v.to_dict() for k, v in self.outputs.items()},
        }


#: Output attributes holding the acquisition time span of the data (ISO 8601 start and end).
ACQUISITION_ATTRS = ("acquisition_start", "acquisition_end")


def acquisition_span(specs) -> tuple[str, str] | None:
    """The earliest start and latest end of the acquisition attributes of ``specs`` (None if none has them)."""
    import datetime as _dt

    def when(v: str) -> _dt.datetime:
        t = _dt.datetime.fromisoformat(str(v))
        return t if t.tzinfo else t.replace(tzinfo=_dt.timezone.utc)

    starts, ends = [], []
    for spec in specs:
        a = spec.attrs
        if a.get(ACQUISITION_ATTRS[0]):
            starts.append(a[ACQUISITION_ATTRS[0]])
            ends.append(a.get(ACQUISITION_ATTRS[1]) or a[ACQUISITION_ATTRS[0]])
    if not starts:
        return None
    return min(starts, key=when), max(ends, key=when)


def params_dump(params: Any) -> dict:
    """The JSON-able dump of a step's parameter object: what keys, ledgers and provenance record."""
    if hasattr(params, "model_dump"):
        return _jsonable(params.model_dump(mode="json"))
    if dataclasses.is_dataclass(params) and not isinstance(params, type):
        return _jsonable(dataclasses.asdict(params))
    if isinstance(params, Mapping):
        return _jsonable(dict(params))
    raise StepError(f"step parameters must be a pydantic model, a dataclass or a mapping. Got {type(params).__name__}")


def _jsonable(v: Any) -> Any:
    if hasattr(v, "model_dump") and not isinstance(v, type):  # a typed parameter object nested in another
        return _jsonable(v.model_dump(mode="json"))
    if isinstance(v, Mapping):
        return {str(k): _jsonable(x) for k, x in v.items()}
    if isinstance(v, (list, tuple)):
        return [_jsonable(x) for x in v]
    if isinstance(v, np.ndarray):
        return _jsonable(v.tolist())
    if isinstance(v, np.generic):
        return v.item()
    if isinstance(v, float) and v != v:
        return "NaN"
    return v


def canonical_json(v: Any) -> str:
    return json.dumps(_jsonable(v), sort_keys=True, separators=(",", ":"), default=str)


def hash_static(static: Mapping[str, Any]) -> str:
    h = hashlib.sha256()
    for k in sorted(static):
        v = static[k]
        h.update(k.encode())
        if isinstance(v, np.ndarray):
            h.update(str(v.dtype).encode() + str(v.shape).encode())
            h.update(np.ascontiguousarray(v).tobytes())
        else:
            h.update(canonical_json(v).encode())
    return h.hexdigest()[:16]
