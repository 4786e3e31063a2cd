"""The planner: what a list of steps will cost before anything heavy runs.

:func:`estimate` counts, per step and for the run: tiles, tasks (fit and tile tasks), passes over each
store (with the fused passes of :mod:`swathmill.tiles.fuse` and the fits of :mod:`swathmill.tiles.fitpass`
that share a pass or ride on the pass making their input, as in a fresh run), bytes read and written, disk needed,
peak memory per worker and, given a probe, a time estimate. It reads no pixel.

:func:`probe` runs the steps for real on a few tiles in a scratch folder (inside the run directory, removed
afterwards): it times each kernel and fit on those tiles (on the run's workers when given its executor,
so the times include their contention), and the read of each tile's inputs alone (a fused pass reads
once for all its members, a fit riding on a pass reads nothing), measures the compressed size of what
they wrote and the kernel's peak of allocated memory (``tracemalloc``, which numpy reports its arrays
to). The tiles are a systematic sample of the grid (:func:`probe_tiles`), edges included in about
their share, so that the compression measured on them (nodata compresses to almost nothing) stands
for the whole grid.

Without a probe, sizes on disk assume :data:`DEFAULT_RATIO` (compressed / raw bytes; 1.0 means no
compression is counted on, which errs on the side of refusing a run that would have fitted), products
add :data:`OVERVIEW_FACTOR` for their overviews, and outputs that depend on a fitted model (e.g. the
number of components) are counted with as many bands as the step's input, marked ``outputs_guessed``.
"""
from __future__ import annotations

import dataclasses
import functools
import shutil
import statistics
import time
import tracemalloc
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any, Mapping, Sequence

import numpy as np

from .fuse import fusion_groups, task_memory
from .grid import Grid, Tiling
from .step import InputMeta, OutputSpec, Step
from .store import StoreLayout, TileStore, create_store
from .tasks import TileTask, load_model, read_block, run_accumulate, run_tile, save_model

__all__ = ["StepEstimate", "RunEstimate", "ProbeResult", "estimate", "probe", "probe_tiles", "DEFAULT_RATIO",
           "OVERVIEW_FACTOR", "format_bytes"]

DEFAULT_RATIO = 1.0  # compressed / raw bytes when no probe measured it (no compression counted on)
OVERVIEW_FACTOR = 4.0 / 3.0  # a COG with 2x overviews down to one tile holds about 4/3 of its full level


@dataclass
class ProbeResult:
    """What running a step on a few tiles measured."""

    tiles: int = 0
    tile_seconds: float | None = None  # median seconds of one tile task (read, kernel, write)
    read_seconds: float | None = None  # median seconds of reading one tile's inputs (shared in a fused pass)
    fit_seconds: float | None = None  # median seconds of one fit accumulation (read and accumulate)
    fit_read_seconds: float | None = None  # median seconds of reading one fit tile's inputs
    finalize_seconds: float | None = None  # seconds of making the model from the merged accumulators
    ratio: float | None = None  # compressed bytes on disk / raw bytes written
    product_ratio: float | None = None  # the same for the products, compressed as the COG export does
    peak_bytes: int | None = None  # peak of memory allocated while one tile ran (tracemalloc)
    outputs: dict[str, OutputSpec] | None = None
    error: str | None = None
    note: str | None = None


@dataclass
class StepEstimate:
    step: str
    tiles: int
    fit_tiles: int
    tasks: int
    reads: dict[str, int]  # store ref -> passes (fit passes included)
    bytes_read: int
    bytes_written: int
    disk: int  # store on disk
    products: int  # COG products on disk
    memory: int  # peak bytes per task
    memory_source: str  # "declared" (from the specs) or "probe"
    ratio: float
    ratio_source: str
    outputs_guessed: bool
    seconds: float | None  # worker-seconds (sum over tasks); wall time = seconds / slots
    group: int  # the fused pass this step's tiles run in
    note: str | None = None


@dataclass
class RunEstimate:
    steps: list[StepEstimate]
    workers: int
    threads: int
    memory_limit: int | None  # per worker
    tile: int
    fused: bool
    passes: dict[str, int] = field(default_factory=dict)  # store -> passes over it in the run

    @property
    def slots(self) -> int:
        return max(1, self.workers * self.threads)

    @property
    def tasks(self) -> int:
        return sum(s.tasks for s in self.steps)

    @property
    def bytes_read(self) -> int:
        return sum(s.bytes_read for s in self.steps)

    @property
    def bytes_written(self) -> int:
        return sum(s.bytes_written for s in self.steps)

    @property
    def disk(self) -> int:
        return sum(s.disk + s.products for s in self.steps)

    @property
    def memory_per_worker(self) -> int:
        return max((s.memory for s in self.steps), default=0) * self.threads

    @property
    def seconds(self) -> float | None:
        """Wall seconds of the tile and fit tasks of the probed steps (None without a probe)."""
        known = [s.seconds for s in self.steps if s.seconds is not None]
        return sum(known) / self.slots if known else None

    @property
    def seconds_partial(self) -> bool:
        return any(s.seconds is None for s in self.steps)

    def to_dict(self) -> dict:
        return {"workers": self.workers, "threads_per_worker": self.threads, "memory_limit": self.memory_limit,
                "tile": self.tile, "fused": self.fused, "passes": self.passes,
                "run": {"tasks": self.tasks, "bytes_read": self.bytes_read, "bytes_written": self.bytes_written,
                        "disk": self.disk, "memory_per_worker": self.memory_per_worker,
                        "seconds": self.seconds, "seconds_partial": self.seconds_partial},
                "steps": [asdict(s) for s in self.steps]}

    def lines(self) -> list[str]:
        """A plain-text table of the estimate."""
        head = f"{'step':<22}{'tiles':>7}{'tasks':>7}{'read':>11}{'written':>11}{'disk':>11}{'memory':>11}{'time':>10}"
        out = [head]
        for s in self.steps:
            t = "?" if s.seconds is None else _hms(s.seconds / self.slots)
            flag = " *" if s.outputs_guessed else ""
            out.append(f"{s.step:<22}{s.tiles:>7}{s.tasks:>7}{format_bytes(s.bytes_read):>11}"
                       f"{format_bytes(s.bytes_written):>11}{format_bytes(s.disk + s.products):>11}"
                       f"{format_bytes(s.memory):>11}{t:>10}{flag}")
        t = "?" if self.seconds is None else (">" if self.seconds_partial else "") + _hms(self.seconds)
        out.append(f"{'run':<22}{'':>7}{self.tasks:>7}{format_bytes(self.bytes_read):>11}"
                   f"{format_bytes(self.bytes_written):>11}{format_bytes(self.disk):>11}"
                   f"{format_bytes(self.memory_per_worker):>11}{t:>10}")
        out.append("time: tile and fit tasks only (not the export of products)"
                   + ("; steps without a probed time are left out of the run's total" if self.seconds_partial
                      and self.seconds is not None else ""))
        out.append(f"executor: {self.workers} worker(s) x {self.threads} thread(s)"
                   + (f", {format_bytes(self.memory_limit)} per worker" if self.memory_limit else "")
                   + f"; fused passes {'on' if self.fused else 'off'}; memory of the run = per worker")
        out.append("passes over each store: " + ", ".join(f"{k} {v}" for k, v in self.passes.items()))
        if any(s.outputs_guessed for s in self.steps):
            out.append("* outputs depend on a fitted model; counted with as many bands as the input (--probe fits "
                       "on a few tiles to know them)")
        notes = [f"{s.step}: {s.note}" for s in self.steps if s.note]
        out += notes
        return out


def format_bytes(n: float | None) -> str:
    if n is None:
        return "?"
    for unit in ("B", "KiB", "MiB", "GiB", "TiB"):
        if abs(n) < 1024 or unit == "TiB":
            return f"{n:.0f} {unit}" if unit == "B" else f"{n:.1f} {unit}"
        n /= 1024
    return f"{n:.1f} TiB"


def _hms(s: float) -> str:
    s = int(round(s))
    return f"{s // 3600}:{s % 3600 // 60:02d}:{s % 60:02d}"


def _tiling(grid: Grid, tile: int, halo: int) -> Tiling:
    """The tiling the engine uses, with the halo cut to the tile where the engine would refuse it."""
    return Tiling(grid, tile, min(halo, tile))


def _read_area(tiling: Tiling, chunk: int, tiles=None) -> int:
    """Pixels decoded to read every tile's padded window (zarr decodes whole inner chunks)."""
    g = tiling.grid
    total = 0
    for t in tiles if tiles is not None else tiling:
        p = t.padded
        r0, c0 = p.row // chunk * chunk, p.col // chunk * chunk
        r1 = min(-(-(p.row + p.rows) // chunk) * chunk, g.rows)
        c1 = min(-(-(p.col + p.cols) // chunk) * chunk, g.cols)
        total += (r1 - r0) * (c1 - c0)
    return total


def _spec_bytes(specs: Mapping[str, OutputSpec] | Sequence[OutputSpec]) -> int:
    vals = specs.values() if isinstance(specs, Mapping) else specs
    return sum(len(s.bands) * np.dtype(s.dtype).itemsize for s in vals)


def _guess_outputs(step: Step, meta: dict[str, InputMeta], model: Any) -> tuple[dict[str, OutputSpec], bool]:
    try:
        return step.resolve_outputs(meta, model), False
    except Exception:  # noqa: BLE001 - outputs that need the fitted model: guessed below
        first = next(iter(meta.values()), None)
        nb = len(first.spec.bands) if first else 1
        return {"unknown": OutputSpec(bands=tuple(f"b{i}" for i in range(nb)), dtype="float32",
                                      nodata=float("nan"))}, True


def estimate(steps: Sequence[Step], *, tile: int, layout: StoreLayout, grid: Grid | None = None,
             sources: Mapping[str, tuple[Grid, Mapping[str, OutputSpec]]] | None = None,
             reader_bytes: Mapping[str, int] | None = None, workers: int = 1, threads: int = 1,
             memory_limit: int | None = None, fuse: bool = True, export: bool = True,
             probed: Mapping[str, ProbeResult] | None = None) -> RunEstimate:
    """The cost of running ``steps`` (in order) with tiles of ``tile`` px.

    sources: name -> (grid, outputs) of stores the steps read that no step makes.
    reader_bytes: step name -> bytes a reader step reads from outside files (e.g. the flight lines).
    probed: step name -> what :func:`probe` measured (times, compression, memory, outputs).
    """
    probed = dict(probed or {})
    known: dict[str, tuple[Grid, dict[str, OutputSpec]]] = {k: (g, dict(o)) for k, (g, o) in (sources or {}).items()}
    groups = fusion_groups(steps) if fuse else [[s] for s in steps]
    group_of = {s.name: i for i, g in enumerate(groups) for s in g}
    passes: dict[str, int] = {}
    counted_groups: set[tuple] = set()
    made: set[str] = set()  # steps (not sources) met so far
    out: list[StepEstimate] = []
    for step in steps:
        meta: dict[str, InputMeta] = {}
        g = step.grid if step.reader is not None else None
        for alias, ref in step.inputs.items():
            src, output = ref.split("/")
            sg, specs = known.get(src, (grid, {}))
            spec = specs.get(output) or next(iter(specs.values()), None)
            if spec is None:
                spec = OutputSpec(bands=("b0",), dtype="float32", nodata=float("nan"))
            meta[alias] = InputMeta(ref, sg, spec)
            g = sg
        g = g or grid
        pr = probed.get(step.name)
        if pr is not None and pr.outputs is not None:
            outputs, guessed = dict(pr.outputs), False
        else:
            outputs, guessed = _guess_outputs(step, meta, None)
        note = None
        if max(step.halo, step.fit.halo if step.fit else 0) > tile:
            note = (f"halo of {max(step.halo, step.fit.halo if step.fit else 0)} px is larger than the tile size "
                    f"of {tile} px: the run refuses this step (counted here with the halo cut to the tile)")
        tiling = _tiling(g, tile, step.halo)
        n = len(tiling)
        fit_tiles = 0
        read = 0
        reads: dict[str, int] = {}
        in_bytes = _spec_bytes([m.spec for m in meta.values()])
        if step.fit is not None:
            ft = list(_tiling(g, tile, step.fit.halo))
            if step.fit.select is not None:
                ft = list(step.fit.select(ft, step.params))
            fit_tiles = len(ft)
            # as the engine does (tiles/fitpass.py): a fit with no halo over outputs of one earlier step rides
            # on that step's pass; other fits of a fused group share one pass over their common input
            srcs = {ref.split("/")[0] for ref in step.inputs.values()}
            rides = (fuse and step.fit.halo == 0 and step.reader is None and len(srcs) == 1
                     and srcs <= made)
            fit_pass = (group_of[step.name], "fit", ",".join(sorted(step.inputs.values())))
            first_fit = not fuse or fit_pass not in counted_groups
            if not rides:
                counted_groups.add(fit_pass)
            if not rides and first_fit:
                read += _read_area(_tiling(g, tile, step.fit.halo), layout.chunk, ft) * (in_bytes + 1)
                for src in srcs:
                    reads[src] = reads.get(src, 0) + 1
                    passes[src] = passes.get(src, 0) + 1
        if step.reader is not None:
            read += int((reader_bytes or {}).get(step.name, 0))
        else:
            shared = (group_of[step.name], ",".join(sorted(step.inputs.values())))
            first_of_group = shared not in counted_groups
            counted_groups.add(shared)
            for ref in set(step.inputs.values()):
                src = ref.split("/")[0]
                reads[src] = reads.get(src, 0) + 1
                if first_of_group:
                    passes[src] = passes.get(src, 0) + 1
            if first_of_group or not fuse:
                gmax = max(s.halo for s in groups[group_of[step.name]]) if fuse else step.halo
                read += _read_area(_tiling(g, tile, gmax), layout.chunk) * (in_bytes + 1)
        core_px = g.rows * g.cols
        written = core_px * (_spec_bytes(outputs) + 1)
        if pr is not None and pr.ratio is not None:
            ratio, rsrc = pr.ratio, "probe"
        else:
            ratio, rsrc = DEFAULT_RATIO, "default"
        disk = int(written * ratio)
        prod = 0
        if export:
            prod_raw = core_px * sum(len(s.bands) * np.dtype(s.dtype).itemsize for s in outputs.values() if s.product)
            pratio = pr.product_ratio if pr is not None and pr.product_ratio is not None else ratio
            prod = int(prod_raw * pratio * OVERVIEW_FACTOR)
        pad = (min(tile + 2 * step.halo, g.rows), min(tile + 2 * step.halo, g.cols))
        if pr is not None and pr.peak_bytes is not None:
            mem, msrc = pr.peak_bytes, "probe"
        else:
            ins = [m.spec for m in meta.values()]
            if step.reader is not None:  # the reader's block is about the size of the output, in float32
                ins = [OutputSpec(bands=tuple(f"b{i}" for i in range(sum(len(s.bands) for s in outputs.values()))),
                                  dtype="float32", nodata=float("nan"))]
            mem, msrc = task_memory(pad, ins, outputs.values(), core=(min(tile, g.rows), min(tile, g.cols)),
                                    decode=step.decode), "declared"
        secs = None
        for extra in (pr.error, pr.note) if pr is not None else ():
            if extra:
                note = f"{note}; {extra}" if note else extra
        if pr is not None and pr.tile_seconds is not None:
            # the probe reads each step's input itself; in a fused pass only the first member reads it, and
            # a fit that rides on the pass making its input (or shares a fit pass) reads nothing of its own
            tile_s, fit_s = pr.tile_seconds, pr.fit_seconds or 0.0
            if fuse and step.reader is None and not first_of_group:
                tile_s = max(0.0, tile_s - (pr.read_seconds or 0.0))
            if step.fit is not None and fuse and (rides or not first_fit):
                fit_s = max(0.0, fit_s - (pr.fit_read_seconds or 0.0))
            # the model is made on the client while the workers wait: slots x its seconds of worker time
            secs = n * tile_s + fit_tiles * fit_s + (pr.finalize_seconds or 0.0) * max(1, workers * threads)
        out.append(StepEstimate(step.name, n, fit_tiles, n + fit_tiles, reads, int(read), int(written), disk, prod,
                                int(mem), msrc, ratio, rsrc, guessed, secs, group_of[step.name], note))
        known[step.name] = (g, outputs)
        made.add(step.name)
    return RunEstimate(out, workers, threads, memory_limit, tile, fuse, passes)


def probe_tiles(grid: Grid, tile: int, n: int) -> list[tuple[int, int]]:
    """``n`` tile indices spread over the grid: a systematic sample of the tiles in row-major order (the
    middle tile of each of ``n`` equal runs), so that edge tiles (often part nodata) are probed in about
    the share the grid holds them and the compression measured on them stands for the whole grid."""
    tiling = Tiling(grid, tile)
    ni, nj = tiling.shape
    total = ni * nj
    n = max(1, min(n, total))
    picks = []
    for k in range(n):
        flat = min(total - 1, int((k + 0.5) * total / n))
        picks.append((flat // nj, flat % nj))
    return picks


def _dir_bytes(path: Path) -> int:
    return sum(p.stat().st_size for p in path.rglob("*") if p.is_file() and p.name != "zarr.json")


def _moved_points(step: Step, store: TileStore, tasks: Sequence[TileTask]) -> Step:
    """``step`` with its fit's sample points moved onto valid pixels of the probed tiles' cores (spread
    evenly over them, in order), so that a fit which needs every sample finishes on those tiles."""
    rk, ck = step.fit.points
    rows, cols = np.asarray(step.static[rk]), np.asarray(step.static[ck])
    if rows.size == 0:
        return step
    held = np.zeros(rows.size, dtype=bool)
    for t in tasks:
        held |= t.tile.core.contains(rows, cols)
    if held.all():
        return step
    vr, vc = [], []
    for t in tasks:
        core = t.tile.core
        rr, cc = np.nonzero(store.read_valid(core))
        vr.append(rr + core.row)
        vc.append(cc + core.col)
    vr, vc = np.concatenate(vr), np.concatenate(vc)
    if vr.size == 0:
        raise LookupError("the probed tiles hold no valid pixel to gather the fit's samples on")
    at = np.linspace(0, vr.size - 1, rows.size).round().astype(np.intp)
    static = {**step.static, rk: vr[at].astype(rows.dtype), ck: vc[at].astype(cols.dtype)}
    return dataclasses.replace(step, static=static)


def product_ratio(store: TileStore, outputs: Mapping[str, OutputSpec], tasks: Sequence[TileTask]) -> float | None:
    """Compressed / raw bytes of the products' pixels on the probed tiles, each tile written to an
    in-memory GeoTIFF with the COG export's compression (DEFLATE with the horizontal or floating-point
    predictor, tiles of COG_BLOCK px, bands interleaved by band); None without products."""
    from rasterio.io import MemoryFile

    from .cog import COG_BLOCK

    raw = packed = 0
    for name, spec in outputs.items():
        if not spec.product:
            continue
        dt = np.dtype(spec.dtype)
        for t in tasks:
            core = t.tile.core
            a = store.read(name, core)
            blk = min(COG_BLOCK, -(-max(core.rows, core.cols) // 16) * 16)  # a tile smaller than a block: its size
            with MemoryFile() as mf:
                with mf.open(driver="GTiff", width=core.cols, height=core.rows, count=a.shape[0], dtype=dt.name,
                             crs=store.grid.crs, transform=store.grid.transform, tiled=True, blockxsize=blk, blockysize=blk, compress="DEFLATE",
                             predictor=3 if dt.kind == "f" else 2, interleave="band") as ds:
                    ds.write(a)
                packed += mf.getbuffer().nbytes
            raw += a.nbytes
    return packed / raw if raw else None


def _timed_tile(task: TileTask) -> tuple[float, float]:
    """Seconds of one tile task (read, kernel, write), then of reading its inputs alone."""
    t0 = time.perf_counter()
    run_tile(task)
    t1 = time.perf_counter()
    read_block(task)
    return t1 - t0, time.perf_counter() - t1


def _timed_fit(task: TileTask) -> tuple[Any, float, float]:
    """The accumulator of one fit tile and its seconds (read and accumulate), then of reading alone."""
    t0 = time.perf_counter()
    acc = run_accumulate(task)
    t1 = time.perf_counter()
    read_block(task)
    return acc, t1 - t0, time.perf_counter() - t1


def _import_modules(names: Sequence[str], _item: Any = None) -> None:
    """Import the steps' modules on a worker before anything is timed there."""
    import importlib

    for n in names:
        importlib.import_module(n)


def _run_all(executor: Any, fn, items: Sequence) -> list:
    """``fn`` over ``items`` on the executor (all at once, as a run's pass); results in the items' order."""
    if executor is None:
        return [fn(it) for it in items]
    got: dict[int, Any] = {}
    failed: list[BaseException] = []
    keyed = list(enumerate(items))
    executor.map(functools.partial(_keyed, fn), keyed, lambda item, res: got.__setitem__(item[0], res),
                 lambda item, exc, tb: failed.append(exc))
    if failed:
        raise failed[0]
    return [got[k] for k, _ in keyed]


def _keyed(fn, item: tuple[int, Any]) -> Any:
    return fn(item[1])


def probe(steps: Sequence[Step], scratch: Path, *, tile: int, layout: StoreLayout,
          sources: Mapping[str, Path] | None = None, n_tiles: int = 4,
          executor: Any = None) -> dict[str, ProbeResult]:
    """Run every step on ``n_tiles`` tiles in ``scratch`` (removed afterwards); see the module docstring.

    ``executor``: the run's executor (e.g. its local Dask cluster): each step's probed tiles and fit
    tiles run on its workers at once, as in a run, so the times include the workers' contention for
    the cores and memory; without it they run one after another in this process.

    Fits run on the same tiles (none when the fit's selection is empty, e.g. a library reference); a fit
    that gathers sample points (``Fit.points``) has its points moved onto the probed tiles, which gives
    a model of the run's shape (classes, bands) but not its values: it times the kernel and is never
    kept. A step whose fit still cannot finish (or whose input was not probed) is reported with
    ``error`` and without times; the steps that read it are skipped the same way.
    """
    scratch = Path(scratch)
    if scratch.exists():
        shutil.rmtree(scratch)
    (scratch / "stores").mkdir(parents=True)
    (scratch / "models").mkdir()
    known: dict[str, TileStore] = {k: TileStore(Path(p)) for k, p in (sources or {}).items()}
    results: dict[str, ProbeResult] = {}
    picks: list[tuple[int, int]] | None = None
    if executor is not None:  # imports on the workers before anything is timed there
        mods = sorted({getattr(getattr(f, "func", f), "__module__", None) or "numpy"
                       for st in steps for f in (st.kernel, st.reader) if f is not None})
        _run_all(executor, functools.partial(_import_modules, mods), list(range(4 * max(1, n_tiles))))
    try:
        for step in steps:
            res = ProbeResult()
            results[step.name] = res
            try:
                inputs, meta, g, first = {}, {}, step.grid, None
                for alias, ref in step.inputs.items():
                    src, output = ref.split("/")
                    if src not in known:
                        raise LookupError(f"its input {ref!r} could not be probed")
                    st = known[src]
                    inputs[alias] = (str(st.path), output)
                    meta[alias] = InputMeta(ref, st.grid, st.specs[output])
                    g = st.grid
                    first = first or st
                if picks is None:
                    picks = probe_tiles(g, tile, n_tiles)
                model_path = None
                if step.fit is not None:
                    fstep = step
                    selected = list(_tiling(g, tile, step.fit.halo))
                    if step.fit.select is not None:
                        selected = list(step.fit.select(selected, step.params))
                    # the probed tiles (the only ones holding the inputs made in the scratch folder); a step
                    # that reads outside files fits on a spread of its own selection (e.g. the overlaps)
                    fpicks = picks if step.reader is None else [
                        selected[min(len(selected) - 1, int((k + 0.5) * len(selected) / len(picks)))].index
                        for k in range(min(len(picks), len(selected)))]
                    ftasks = [TileTask(step, ix, g, tile, step.fit.halo, inputs) for ix in fpicks] if selected else []
                    if ftasks and step.fit.points is not None and first is not None:
                        fstep = _moved_points(step, first, ftasks)
                        if fstep is not step:
                            res.note = ("model fitted on the sample points moved into the probed tiles (the run's "
                                        "shape, not its values)")
                            ftasks = [TileTask(fstep, ix, g, tile, step.fit.halo, inputs) for ix in fpicks]
                    timed = _run_all(executor, _timed_fit, ftasks)
                    acc = None
                    for a, _s, _r in timed:
                        acc = a if acc is None else step.fit.merge(acc, a)
                    res.fit_seconds = statistics.median([t[1] for t in timed]) if timed else 0.0
                    res.fit_read_seconds = statistics.median([t[2] for t in timed]) if timed else 0.0
                    base = scratch / "models" / step.name
                    t0 = time.perf_counter()
                    model = step.fit.finalize(acc, step.params, meta)
                    res.finalize_seconds = time.perf_counter() - t0
                    save_model(model, base)
                    model_path = str(base)
                outputs = step.resolve_outputs(meta, load_model(model_path))
                res.outputs = outputs
                spath = scratch / "stores" / f"{step.name}.zarr"
                store = create_store(spath, g, outputs, layout, attrs={"step": step.name, "probe": True})
                empty = _dir_bytes(spath)
                tasks = [TileTask(step, ix, g, tile, step.halo, inputs, str(spath), outputs, model_path)
                         for ix in picks]
                timed = _run_all(executor, _timed_tile, tasks)
                res.tile_seconds = statistics.median([t[0] for t in timed])
                res.read_seconds = min(statistics.median([t[1] for t in timed]), res.tile_seconds)
                res.tiles = len(tasks)
                raw = sum(t.tile.core.rows * t.tile.core.cols for t in tasks) * (_spec_bytes(outputs) + 1)
                res.ratio = max(_dir_bytes(spath) - empty, 0) / raw if raw else None
                res.product_ratio = product_ratio(store, outputs, tasks)
                tracemalloc.start()
                try:
                    run_tile(tasks[0])
                    res.peak_bytes = tracemalloc.get_traced_memory()[1]
                finally:
                    tracemalloc.stop()
                known[step.name] = store
            except Exception as exc:  # noqa: BLE001 - the plan reports it per step
                res.error = f"probe failed: {type(exc).__name__}: {exc}"
    finally:
        shutil.rmtree(scratch, ignore_errors=True)
    return results
