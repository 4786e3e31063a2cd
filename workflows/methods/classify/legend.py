"""One legend for a whole run: class code, name and colour, shared by every class map.

Codes
    ``0`` unclassified (a valid pixel that matched no class; drawn in grey), ``1..k`` the legend's
    classes, ``255`` nodata (outside the mosaic; transparent). A class keeps its code in every class
    map, modal-filtered map, accuracy table and figure of the run, whichever classifier made the map
    and whichever classes it can produce.

Order and colours
    Classes come first from the spectral libraries the run's classifiers use (in the order of the
    configuration, each library's class order), then from the ground reference (classes not yet
    named, in the reference's order). Names are compared exactly (after stripping spaces). A class
    keeps the colour its library gives it, unless that colour is near-white or near-black
    (:func:`swathmill.tiles.palette.background_like`: it would read as background or nodata), which
    is replaced with a warning; other classes take the colour-blind-safe default palette
    (:func:`swathmill.tiles.palette.default_class_colors`), colours already taken used last.

Files
    :meth:`Legend.write_csv` writes ``legend.csv`` (columns ``code,name,color,source``, the
    unclassified and nodata codes included) in the run directory; :func:`read_legend` reads it back.
"""
from __future__ import annotations

import csv
import io
import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import Iterable, Sequence

from swathmill.tiles.palette import (CLASS_NODATA, MAX_CLASSES, UNCLASSIFIED, UNCLASSIFIED_RGB, background_like,
                                     default_class_colors, hex_to_rgb, rgb_to_hex)

from .shared import ClassifyError

__all__ = ["LEGEND_FILE", "LegendEntry", "Legend", "build_legend", "step_legend", "read_legend"]

LEGEND_FILE = "legend.csv"
_COLUMNS = ("code", "name", "color", "source")


@dataclass(frozen=True)
class LegendEntry:
    """One class of the legend: its code (1..254), name, RGB colour and where the colour came from."""

    code: int
    name: str
    color: tuple[int, int, int]
    source: str = "palette"


@dataclass(frozen=True)
class Legend:
    """The run's classes, codes 1..k in order (:attr:`entries`)."""

    entries: tuple[LegendEntry, ...]

    def __post_init__(self) -> None:
        if len(self.entries) > MAX_CLASSES:
            raise ClassifyError(f"a legend holds at most {MAX_CLASSES} classes (uint8 maps, 0 unclassified, "
                                f"{CLASS_NODATA} nodata). Got {len(self.entries)}")
        for i, e in enumerate(self.entries, start=1):
            if e.code != i:
                raise ClassifyError(f"legend codes must run 1..k in order: class {e.name!r} has code {e.code}, "
                                    f"expected {i}")
        names = [e.name for e in self.entries]
        dup = sorted({n for n in names if names.count(n) > 1})
        if dup:
            raise ClassifyError(f"legend class names must be unique. Got {dup} more than once")

    @property
    def names(self) -> tuple[str, ...]:
        """Class names of codes 1..k."""
        return tuple(e.name for e in self.entries)

    @property
    def colors(self) -> tuple[tuple[int, int, int], ...]:
        """RGB colours of codes 1..k."""
        return tuple(e.color for e in self.entries)

    def code(self, name: str, where: str = "") -> int:
        """The code of class ``name``; raises naming ``where`` (e.g. the step) when it is not in the legend."""
        for e in self.entries:
            if e.name == name:
                return e.code
        at = f"{where}: " if where else ""
        raise ClassifyError(f"{at}class {name!r} is not in the run's legend; its classes are {list(self.names)}")

    def codes(self, names: Iterable[str], where: str = "") -> tuple[int, ...]:
        """The codes of several class names (see :meth:`code`)."""
        return tuple(self.code(n, where) for n in names)

    def rows(self) -> list[dict]:
        """Every code of a class map, unclassified and nodata included: code, name, color (#rrggbb), source."""
        out = [{"code": UNCLASSIFIED, "name": "unclassified", "color": rgb_to_hex(UNCLASSIFIED_RGB),
                "source": "valid pixel matching no class"}]
        out += [{"code": e.code, "name": e.name, "color": rgb_to_hex(e.color), "source": e.source}
                for e in self.entries]
        out.append({"code": CLASS_NODATA, "name": "nodata", "color": "", "source": "outside the mosaic"})
        return out

    def to_csv(self) -> str:
        """The legend as CSV text (``code,name,color,source``)."""
        buf = io.StringIO()
        w = csv.DictWriter(buf, fieldnames=_COLUMNS, lineterminator="\n")
        w.writeheader()
        w.writerows(self.rows())
        return buf.getvalue()

    def write_csv(self, path: str | Path) -> Path:
        """Write :meth:`to_csv` to ``path`` (atomically, through a temporary file beside it)."""
        path = Path(path)
        tmp = path.with_name(f".{path.name}.tmp")
        tmp.write_text(self.to_csv(), encoding="utf-8")
        tmp.replace(path)
        return path


def build_legend(sources: Sequence[tuple[str, Sequence[str], Sequence[tuple[int, int, int] | None] | None]]
                 ) -> Legend:
    """The legend of a run from its class sources, in order.

    Parameters
    ----------
    sources : ``(label, class_names, colours or None)`` per source (a library, a ground reference),
        libraries first. ``label`` names the source in the ``source`` column and in warnings; a
        colour may be None for a class without one.
    """
    names: list[str] = []
    colors: dict[str, tuple[int, int, int]] = {}
    origin: dict[str, str] = {}
    for label, cnames, ccolors in sources:
        if ccolors is not None and len(ccolors) != len(cnames):
            raise ClassifyError(f"{label}: {len(ccolors)} colours for {len(cnames)} classes")
        for i, n in enumerate(cnames):
            n = str(n).strip()
            if not n:
                raise ClassifyError(f"{label}: a class has an empty name")
            if n not in names:
                names.append(n)
            c = None if ccolors is None else ccolors[i]
            if c is None or n in colors:
                continue
            rgb = tuple(int(v) for v in c)
            bad = background_like(rgb)
            if bad:
                warnings.warn(f"{label}: colour {rgb_to_hex(rgb)} of class {n!r} is {bad} (it would read as "
                              "background or nodata in a GIS); the default palette colours it instead",
                              UserWarning, stacklevel=2)
                continue
            colors[n] = rgb
            origin[n] = label
    if len(names) > MAX_CLASSES:
        raise ClassifyError(f"the run names {len(names)} classes; a class map holds at most {MAX_CLASSES}")
    fill = iter(default_class_colors(len(names), tuple(colors.values())))
    entries = []
    for i, n in enumerate(names, start=1):
        if n in colors:
            entries.append(LegendEntry(i, n, colors[n], f"colour from {origin[n]}"))
        else:
            entries.append(LegendEntry(i, n, next(fill), "default palette"))
    return Legend(tuple(entries))


def step_legend(legend: Legend | None, step: str, class_names: Sequence[str],
                colors: Sequence[Sequence[int]] | None = None, source: str = "references") -> Legend:
    """``legend`` when given, else a legend of one step's own classes (and colours)."""
    if legend is not None:
        return legend
    return build_legend([(f"step {step!r} {source}", list(class_names),
                          None if colors is None else [tuple(int(v) for v in c) for c in colors])])


def read_legend(path: str | Path) -> Legend:
    """Read a ``legend.csv`` written by :meth:`Legend.write_csv` (errors name the file and line)."""
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise ClassifyError(f"legend {path} does not exist") from None
    rows = list(csv.DictReader(io.StringIO(text)))
    missing = [c for c in _COLUMNS if rows and c not in rows[0]]
    if not rows or missing:
        raise ClassifyError(f"legend {path}: expected columns {list(_COLUMNS)}; missing {missing or 'all rows'}")
    entries = []
    for line, r in enumerate(rows, start=2):
        try:
            code = int(r["code"])
        except ValueError:
            raise ClassifyError(f"legend {path}, line {line}: code must be an integer. Got {r['code']!r}") from None
        if code in (UNCLASSIFIED, CLASS_NODATA):
            continue
        try:
            rgb = hex_to_rgb(r["color"])
        except ValueError as exc:
            raise ClassifyError(f"legend {path}, line {line}: {exc}") from None
        entries.append(LegendEntry(code, r["name"], rgb, r["source"]))
    return Legend(tuple(entries))
