"""Per-tile accumulator results kept on disk without pickle (the refit mode of growing campaigns).

A fit's accumulator result (what ``Fit.accumulate`` returns for one tile) is stored as two files:

- ``<stem>-<hash>.npz``: its numpy arrays (and numpy scalars, as 0-d arrays), written with
  ``numpy.savez`` and read back with ``allow_pickle=False`` (an object array is refused on both sides);
- ``<stem>.json``: what the file is (``format``, ``version``, the step, the tile's absolute index, the
  accumulator key it was computed under, the name and SHA-256 of its ``.npz``) and ``tree``, the nested
  structure of the result as tagged JSON nodes:

  ``["n"]`` None, ``["b", v]`` bool, ``["i", v]`` int, ``["f", hex]`` float (``float.hex``, exact,
  NaN and infinities included), ``["s", v]`` str, ``["a", name]`` array, ``["g", name]`` numpy scalar,
  ``["l", [...]]`` list, ``["t", [...]]`` tuple, ``["d", [[key, value], ...]]`` dict (keys are nodes,
  order kept), ``["c", "module:qualname", [[field, value], ...]]`` a dataclass instance.

A dataclass is stored and rebuilt only when its class lives in a trusted module (the step's own fit
modules, or this package); nothing else is imported on reading. A value of any other type is refused
when it is stored, naming the step, the tile and where in the result it sits. A file that is not such
a description, whose arrays file is missing or does not match its hash, is refused on reading with an
error naming it (delete it to have the tile accumulated again).

The ``.npz`` is written first under a name holding its hash, then the ``.json`` replaces the old one
atomically: a kill at any point leaves either the old pair or the new one (an orphan ``.npz`` is
removed by the next write of that tile).
"""
from __future__ import annotations

import dataclasses
import hashlib
import importlib
import json
import os
from pathlib import Path
from typing import Any, Iterable

import numpy as np

from ..errors import SwathmillError

__all__ = ["AccumulatorError", "AccumulatorFiles", "encode_tree", "decode_tree", "FORMAT"]

FORMAT = "swathmill accumulator"
VERSION = 1
_PACKAGE = __name__.split(".")[0] + "."  # "swathmill."


class AccumulatorError(SwathmillError, ValueError):
    """An accumulator result cannot be stored, or a stored one cannot be read; the message names it."""


def _trusted(module: str, trusted: Iterable[str]) -> bool:
    return module.startswith(_PACKAGE) or module in set(trusted)


def encode_tree(value: Any, arrays: dict[str, np.ndarray], trusted: Iterable[str] = (), where: str = "acc") -> list:
    """The JSON node of ``value``; its arrays are added to ``arrays`` under fresh names."""
    trusted = tuple(trusted)
    if value is None:
        return ["n"]
    if isinstance(value, bool):
        return ["b", value]
    if isinstance(value, np.generic):
        if value.dtype.kind == "O":
            raise AccumulatorError(f"{where}: a numpy object scalar cannot be stored without pickle")
        name = f"a{len(arrays)}"
        arrays[name] = np.asarray(value)
        return ["g", name]
    if isinstance(value, int):
        return ["i", int(value)]
    if isinstance(value, float):
        return ["f", float(value).hex()]
    if isinstance(value, str):
        return ["s", value]
    if isinstance(value, np.ndarray):
        if value.dtype.kind in "OV":
            raise AccumulatorError(f"{where}: an array of dtype {value.dtype} cannot be stored without pickle")
        name = f"a{len(arrays)}"
        arrays[name] = value
        return ["a", name]
    if isinstance(value, (list, tuple)):
        items = [encode_tree(v, arrays, trusted, f"{where}[{n}]") for n, v in enumerate(value)]
        return ["t" if isinstance(value, tuple) else "l", items]
    if isinstance(value, dict):
        return ["d", [[encode_tree(k, arrays, trusted, f"{where} key {k!r}"),
                       encode_tree(v, arrays, trusted, f"{where}[{k!r}]")] for k, v in value.items()]]
    if dataclasses.is_dataclass(value) and not isinstance(value, type):
        cls = type(value)
        if not _trusted(cls.__module__, trusted):
            raise AccumulatorError(f"{where}: a {cls.__module__}.{cls.__qualname__} is a dataclass of a module that "
                                   f"is neither this package's nor the step's own (trusted: {sorted(trusted)})")
        fields = dataclasses.fields(value)
        if any(not f.init for f in fields):
            raise AccumulatorError(f"{where}: dataclass {cls.__qualname__} has fields it cannot be built with")
        return ["c", f"{cls.__module__}:{cls.__qualname__}",
                [[f.name, encode_tree(getattr(value, f.name), arrays, trusted, f"{where}.{f.name}")] for f in fields]]
    raise AccumulatorError(f"{where}: a value of type {type(value).__module__}.{type(value).__qualname__} cannot be "
                           "stored; an accumulator result is made of dicts, lists, tuples, numpy arrays, numbers, "
                           "strings, None and dataclasses of the step's own modules")


def decode_tree(node: Any, arrays: dict[str, np.ndarray], trusted: Iterable[str] = ()) -> Any:
    """The value a node of :func:`encode_tree` describes (raises ValueError/KeyError/TypeError on a bad node)."""
    trusted = tuple(trusted)
    tag = node[0]
    if tag == "n":
        return None
    if tag == "b":
        return bool(node[1])
    if tag == "i":
        if type(node[1]) is not int:
            raise ValueError(f"an int node holds {node[1]!r}")
        return node[1]
    if tag == "f":
        return float.fromhex(node[1])
    if tag == "s":
        return str(node[1])
    if tag == "a":
        return arrays[node[1]]
    if tag == "g":
        return arrays[node[1]][()]
    if tag in ("l", "t"):
        items = [decode_tree(v, arrays, trusted) for v in node[1]]
        return tuple(items) if tag == "t" else items
    if tag == "d":
        return {decode_tree(k, arrays, trusted): decode_tree(v, arrays, trusted) for k, v in node[1]}
    if tag == "c":
        module, _, qual = str(node[1]).partition(":")
        if not _trusted(module, trusted):
            raise ValueError(f"it names a class of an untrusted module: {module!r}")
        cls: Any = importlib.import_module(module)
        for part in qual.split("."):
            cls = getattr(cls, part)
        if not (isinstance(cls, type) and dataclasses.is_dataclass(cls)):
            raise ValueError(f"{node[1]!r} is not a dataclass")
        return cls(**{str(k): decode_tree(v, arrays, trusted) for k, v in node[2]})
    raise ValueError(f"unknown node {tag!r}")


class AccumulatorFiles:
    """The kept accumulator results of one step: ``<folder>/acc_<I>_<J>.json`` (+ its ``.npz``) per tile."""

    def __init__(self, folder: Path, step: str, trusted: Iterable[str] = ()):
        self.dir = Path(folder)
        self.step = step
        self.trusted = tuple(trusted)

    def stem(self, index: tuple[int, int]) -> Path:
        return self.dir / f"acc_{int(index[0])}_{int(index[1])}"

    def _header(self, index: tuple[int, int]) -> dict | None:
        path = self.stem(index).with_suffix(".json")
        if not path.is_file():
            return None
        try:
            head = json.loads(path.read_text())
        except (OSError, ValueError) as exc:
            raise self._bad(path, f"not readable JSON ({exc})") from exc
        if not isinstance(head, dict) or head.get("format") != FORMAT:
            raise self._bad(path, f"not a {FORMAT!r} file (format {head.get('format') if isinstance(head, dict) else None!r})")
        if head.get("version") != VERSION or head.get("step") != self.step or head.get("tile") != [int(v) for v in index]:
            raise self._bad(path, f"it describes step {head.get('step')!r}, tile {head.get('tile')}, version "
                                  f"{head.get('version')}; expected step {self.step!r}, tile {list(index)}, version {VERSION}")
        return head

    def _bad(self, path: Path, why: str) -> AccumulatorError:
        return AccumulatorError(f"accumulator file {path} of step {self.step!r} is refused: {why}. Delete it (and "
                                "its .npz) to have the tile accumulated again")

    def key(self, index: tuple[int, int]) -> str | None:
        """The accumulator key the tile's kept result was computed under (None if there is none)."""
        head = self._header(index)
        return None if head is None else head.get("key")

    def save(self, index: tuple[int, int], key: str, acc: Any) -> None:
        arrays: dict[str, np.ndarray] = {}
        tree = encode_tree(acc, arrays, self.trusted, f"step {self.step!r}, tile {list(index)}: accumulator result")
        self.dir.mkdir(parents=True, exist_ok=True)
        stem = self.stem(index)
        tmp = stem.with_name(stem.name + ".tmp.npz")
        np.savez(tmp, **arrays)
        digest = hashlib.sha256(tmp.read_bytes()).hexdigest()
        npz = stem.with_name(f"{stem.name}-{digest[:16]}.npz")
        os.replace(tmp, npz)
        head = {"format": FORMAT, "version": VERSION, "step": self.step, "tile": [int(v) for v in index], "key": key,
                "npz": npz.name, "npz_sha256": digest, "tree": tree}
        jtmp = stem.with_name(stem.name + ".tmp.json")
        jtmp.write_text(json.dumps(head, separators=(",", ":")))
        os.replace(jtmp, stem.with_suffix(".json"))
        for old in self.dir.glob(f"{stem.name}-*.npz"):
            if old != npz:
                old.unlink()

    def load(self, index: tuple[int, int], key: str) -> Any:
        """The kept result of the tile, which must have been computed under ``key``."""
        path = self.stem(index).with_suffix(".json")
        head = self._header(index)
        if head is None or head.get("key") != key:
            raise self._bad(path, f"it holds key {None if head is None else head.get('key')!r}, expected {key!r}")
        npz = self.dir / str(head.get("npz", ""))
        if Path(str(head.get("npz", ""))).name != head.get("npz") or not npz.is_file():
            raise self._bad(path, f"its arrays file {head.get('npz')!r} is missing")
        raw = npz.read_bytes()
        if hashlib.sha256(raw).hexdigest() != head.get("npz_sha256"):
            raise self._bad(path, f"its arrays file {npz.name} does not match the hash it records (corrupted or replaced)")
        try:
            with np.load(npz, allow_pickle=False) as z:
                arrays = {k: z[k] for k in z.files}
            return decode_tree(head["tree"], arrays, self.trusted)
        except Exception as exc:  # noqa: BLE001 - any malformed content is refused with the file's name
            raise self._bad(path, f"its content cannot be read without pickle ({type(exc).__name__}: {exc})") from exc

    def clean(self, keep: Iterable[tuple[int, int]]) -> int:
        """Remove interrupted writes and the files of tiles not in ``keep``; return how many tiles were dropped."""
        if not self.dir.is_dir():
            return 0
        names = {self.stem(i).name for i in keep}
        dropped = 0
        for p in sorted(self.dir.iterdir()):
            if ".tmp." in p.name:
                p.unlink()
            elif p.suffix == ".json" and p.stem not in names:
                p.unlink()
                dropped += 1
        live: set[str] = set()
        for p in self.dir.glob("*.json"):
            try:
                live.add(str(json.loads(p.read_text()).get("npz")))
            except (OSError, ValueError, AttributeError):  # refused with its name when the tile is read
                live.update(q.name for q in self.dir.glob(f"{p.stem}-*.npz"))
        for p in self.dir.glob("*.npz"):
            if p.name not in live:
                p.unlink()
        return dropped
