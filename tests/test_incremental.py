"""Growing campaigns: lines added one invocation at a time equal a fresh run over all of them.

Frozen mode (``RunOptions.incremental="frozen"``): per-tile keys, stores that grow by moving shard
files, fitted models kept in ``models/frozen`` and extended to new lines. The reference of every
comparison is a fresh run, in a new directory, over all lines with the same kept models (the
``models/frozen`` folder copied): the products must be equal byte for byte.

Refit mode (``"refit"``): every fit is fitted again exactly, from per-tile accumulator results kept in
``models/refit/accumulators``; its reference is a fresh run over all lines (no models copied), and its
models must equal those of an ordinary (not incremental) run over all lines, byte for byte.

Run as a script, the file runs one incremental invocation (the kill -9 tests start it in a subprocess)::

    python tests/test_incremental.py RUN_DIR LINE.tif [LINE.tif ...] [--sleep S] [--mode frozen|refit]
"""
from __future__ import annotations

import json
import shutil
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import rasterio
from affine import Affine

from swathmill.tiles.executors import LocalExecutor
from swathmill.tiles.grid import Grid, anchor_grid, tile_origin
from swathmill.tiles.incremental import campaign_history, campaign_notes, frozen_model_dir, refit_model_dir
from swathmill.tiles.ops import mean_filter_step
from swathmill.tiles.run import Run, RunOptions, run_status
from swathmill.tiles.store import open_store
from swathmill.workflows.methods.mnf import MnfConfig, mnf_steps
from swathmill.workflows.methods.mosaic import MosaicConfig, build_mosaic_step

CRS = "EPSG:32612"
RES = 5.0
TILE = 16
# the scene's corner lies on the lattice of 16 px tiles (80 m): 500000 / 80 and 4000000 / 80 are whole
T0 = Affine(RES, 0, 500000, 0, -RES, 4000000)
H, W, NB = 80, 112, 6
STEPS = ("mosaic", "smooth", "mnf")


# ------------------------------------------------------------------------------------------ scene


def _truth(seed: int = 3) -> np.ndarray:
    from scipy import ndimage

    rng = np.random.default_rng(seed)
    base = np.stack([ndimage.gaussian_filter(rng.uniform(0, 1, (H, W)), 3) for _ in range(NB)])
    return 0.08 + 0.5 * (base - base.min()) / (base.max() - base.min())


def _line(tmp: Path, name: str, rows: slice, cols: slice, gain: float, offset: float, seed: int,
          folder: str = "lines") -> Path:
    """A line cut from the truth over ``rows`` x ``cols``, with its own brightness and noise."""
    rng = np.random.default_rng(seed)
    obs = _truth()[:, rows, cols] * gain + offset + rng.normal(0, 0.002, (NB, rows.stop - rows.start,
                                                                             cols.stop - cols.start))
    data = np.rint(obs * 1e4).astype(np.int16)
    d = tmp / folder
    d.mkdir(exist_ok=True)
    path = d / f"{name}.tif"
    wl = np.linspace(450, 2300, NB)
    with rasterio.open(path, "w", driver="GTiff", width=data.shape[2], height=data.shape[1], count=NB,
                       dtype="int16", crs=CRS, transform=T0 @ Affine.translation(cols.start, rows.start),
                       nodata=-9999) as ds:
        ds.write(data)
        for b in range(NB):
            ds.update_tags(b + 1, wavelength=repr(float(wl[b])))
    return path


@pytest.fixture(scope="module")
def scene(tmp_path_factory) -> dict[str, Path]:
    tmp = tmp_path_factory.mktemp("scene")
    return {
        # the first line, in the middle
        "centre": _line(tmp, "centre", slice(20, 60), slice(24, 72), 1.0, 0.0, 1),
        # extends the extent east and south
        "southeast": _line(tmp, "southeast", slice(40, 80), slice(60, 112), 1.05, 0.01, 2),
        # extends the extent west and north (the negative directions)
        "northwest": _line(tmp, "northwest", slice(0, 30), slice(0, 36), 0.94, -0.004, 3),
    }


def _steps(lines: list[Path]) -> list:
    mosaic = build_mosaic_step(MosaicConfig(lines=[str(p) for p in lines], anchor=TILE, sample_size=400))
    return [mosaic, mean_filter_step("smooth", "mosaic/reflectance", 3),
            *mnf_steps(MnfConfig(components=3), "mosaic/reflectance")]


def run_once(run_dir: Path, lines: list[Path], executor=None, export: bool = False, mode: str = "frozen"):
    with Run(run_dir, RunOptions(tile=TILE, chunk=TILE, export=export, incremental=mode)) as run:
        return run.execute(_steps(lines), executor or LocalExecutor())


def fresh_with_models(run_dir: Path, models_from: Path, lines: list[Path], export: bool = False):
    """A fresh run over ``lines`` with the kept models of another run directory."""
    shutil.copytree(frozen_model_dir(models_from), frozen_model_dir(run_dir))
    return run_once(run_dir, lines, export=export)


def _arrays(run_dir: Path) -> dict[str, np.ndarray]:
    out = {}
    for step in STEPS:
        st = open_store(run_dir / "stores" / f"{step}.zarr")
        for name in [*st.specs]:
            out[f"{step}/{name}"] = st.read(name, st.grid.full)
        out[f"{step}/valid"] = st.read_valid(st.grid.full)
        out[f"{step}/grid"] = np.array(list(st.grid.transform)[:6] + [st.grid.rows, st.grid.cols])
    return out


def _assert_same(a: dict, b: dict) -> None:
    assert a.keys() == b.keys()
    for k in a:
        assert a[k].dtype == b[k].dtype and a[k].shape == b[k].shape, k
        assert a[k].tobytes() == b[k].tobytes(), f"{k} differs"


def _shards(run_dir: Path, step: str) -> dict[tuple, bytes]:
    """Every stored shard of a step by (array, band shard, absolute tile row, absolute tile col)."""
    spath = run_dir / "stores" / f"{step}.zarr"
    st = open_store(spath)
    I0, J0 = tile_origin(st.grid, TILE)
    out = {}
    for name in [*st.specs, "valid"]:
        root = spath / name / "c"
        for f in root.rglob("*"):
            if f.is_file():
                parts = f.relative_to(root).parts
                out[(name, *parts[:-2], I0 + int(parts[-2]), J0 + int(parts[-1]))] = f.read_bytes()
    return out


def _recomputed(run_dir: Path, step: str) -> set[tuple[int, int]]:
    """Absolute indices of the tiles of ``step`` the latest invocation recomputed."""
    hist = campaign_history(run_dir)[-1]
    st = open_store(run_dir / "stores" / f"{step}.zarr")
    I0, J0 = tile_origin(st.grid, TILE)
    return {(I0 + i, J0 + j) for i, j in hist["tiles"].get(step, [])}


# ------------------------------------------------------------------------------------------- grid


def test_anchored_grid_snaps_outwards_and_indices_are_absolute():
    g = Grid(7, 9, Affine(5.0, 0, 500013.0, 0, -5.0, 4000021.0), CRS)
    a = anchor_grid(g, 16)
    # edges on multiples of 16 * 5 = 80 m (common practice: a tile lattice anchored at the CRS origin)
    left, bottom, right, top = a.bounds
    assert left == 500000.0 and top == 4000080.0 and right == 500080.0 and bottom == 3999920.0
    assert a.bounds[0] <= g.bounds[0] and a.bounds[2] >= g.bounds[2]
    assert a.bounds[1] <= g.bounds[1] and a.bounds[3] >= g.bounds[3]
    assert tile_origin(a, 16) == (-4000080 // 80, 500000 // 80)
    grown = Grid(a.rows + 32, a.cols + 16, a.transform @ Affine.translation(-16, -32), CRS)
    assert tile_origin(grown, 16) == (tile_origin(a, 16)[0] - 2, tile_origin(a, 16)[1] - 1)
    with pytest.raises(ValueError, match="not on the lattice"):
        tile_origin(g, 16)


# ----------------------------------------------------------------------------------- frozen mode


def test_lines_added_in_three_invocations_equal_a_fresh_run_with_the_same_models(scene, tmp_path):
    run_dir = tmp_path / "growing"
    order = [scene["centre"], scene["southeast"], scene["northwest"]]
    r1 = run_once(run_dir, order[:1])
    assert r1.ok
    # second invocation: a line to the east and south
    before = {s: _shards(run_dir, s) for s in STEPS}
    grid1 = open_store(run_dir / "stores" / "mosaic.zarr").grid
    r2 = run_once(run_dir, order[:2])
    assert r2.ok
    grid2 = open_store(run_dir / "stores" / "mosaic.zarr").grid
    assert grid2.rows > grid1.rows and grid2.cols > grid1.cols
    assert tile_origin(grid2, TILE) == tile_origin(grid1, TILE)
    _check_untouched(run_dir, before, r2)
    # third invocation: a line to the west and north; the grid's corner moves, indices do not
    before = {s: _shards(run_dir, s) for s in STEPS}
    r3 = run_once(run_dir, order)
    assert r3.ok
    grid3 = open_store(run_dir / "stores" / "mosaic.zarr").grid
    o2, o3 = tile_origin(grid2, TILE), tile_origin(grid3, TILE)
    assert o3[0] < o2[0] and o3[1] < o2[1]
    _check_untouched(run_dir, before, r3)
    mos = {s.name: s for s in r3.steps}["mosaic"]
    assert 0 < mos.computed < mos.total

    fresh = tmp_path / "fresh"
    rf = fresh_with_models(fresh, run_dir, order)
    assert rf.ok
    assert {s.name: s.fit for s in rf.steps}["mosaic"] == "kept"
    _assert_same(_arrays(run_dir), _arrays(fresh))

    # the history: which lines arrived when, which tiles each invocation recomputed, how long it took
    hist = campaign_history(run_dir)
    assert [[e["line"] for e in h["lines"] if e["event"] == "added"] for h in hist] == [
        ["centre"], ["southeast"], ["northwest"]]
    assert all(h["finished"] and h["seconds"] > 0 and h["mode"] == "frozen" for h in hist)
    assert len(hist[0]["tiles"]["mosaic"]) == {s.name: s for s in r1.steps}["mosaic"].total
    assert len(hist[2]["tiles"]["mosaic"]) == mos.computed
    status = {s["step"]: s for s in run_status(run_dir)}
    assert status["mosaic"]["done"] == status["mosaic"]["total"] and status["mosaic"]["pending"] == 0


def _check_untouched(run_dir: Path, before: dict, result) -> None:
    """Shards of tiles the invocation did not recompute keep their bytes (at their absolute index)."""
    for step in STEPS:
        after = _shards(run_dir, step)
        redone = _recomputed(run_dir, step)
        rep = {s.name: s for s in result.steps}[step]
        assert len(redone) == rep.computed
        kept = [k for k in before[step] if (k[-2], k[-1]) not in redone]
        assert kept, f"{step}: every tile was recomputed"
        for k in kept:
            assert after.get(k) == before[step][k], f"{step}: shard {k} changed but its tile was not recomputed"


def test_reflown_line_replaces_the_old_one_everywhere(scene, tmp_path):
    run_dir = tmp_path / "reflown"
    lines = [scene["centre"], scene["southeast"]]
    assert run_once(run_dir, lines, export=True).ok
    old_src = _arrays(run_dir)["mosaic/source"]
    # the re-flown line: same name, new file content, a smaller footprint and another brightness
    reflown = _line(tmp_path, "southeast", slice(48, 80), slice(68, 108), 1.1, -0.006, 9, folder="reflown")
    r2 = run_once(run_dir, [scene["centre"], reflown], export=True)
    assert r2.ok
    assert any("'southeast' reflown" in m for m in r2.messages)
    mos = {s.name: s for s in r2.steps}["mosaic"]
    assert 0 < mos.computed < mos.total
    fresh = tmp_path / "fresh"
    assert fresh_with_models(fresh, run_dir, [scene["centre"], reflown], export=True).ok
    _assert_same(_arrays(run_dir), _arrays(fresh))
    # nothing of the old line remains: where only it had data there is none now
    new = _arrays(run_dir)
    grid = open_store(run_dir / "stores" / "mosaic.zarr").grid
    # the scene's pixel (row 42, col 110) was covered by the old line only; both stores share the grid
    # (its extent is still the centre line's and the old southeast line's footprint, anchored)
    x, y = T0 @ (110.5, 42.5)
    c, r = (int(v) for v in ~grid.transform @ (x, y))
    assert old_src[0, r, c] == 2 and new["mosaic/source"][0, r, c] == 0
    assert new["mosaic/valid"][r, c] == 0
    # the kept brightness model knows only the current lines' contents
    kept = frozen_model_dir(run_dir)
    model = json.loads((kept / ((kept / "mosaic.current").read_text().split()[0] + ".json")).read_text())
    assert len(model["fingerprints"]) == 2
    # products are re-exported from the new store: the COG's source layer matches it
    with rasterio.open(run_dir / "products" / "mosaic__source.tif") as ds:
        assert np.array_equal(ds.read(1), new["mosaic/source"][0])


# ---------------------------------------------------------------------------------------- kill -9
def _kill_when(args: list[str], ready, poll: float, timeout: float = 120) -> None:
    """Start this file as an invocation with ``args`` and SIGKILL it once ``ready()`` holds."""
    proc = subprocess.Popen([sys.executable, __file__, *args], stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    deadline = time.monotonic() + timeout
    while not ready():
        assert proc.poll() is None, f"the invocation ended before the kill: {proc.communicate()}"
        assert time.monotonic() < deadline, "the invocation did not reach the kill point in time"
        time.sleep(poll)
    proc.send_signal(signal.SIGKILL)
    proc.wait(30)
    assert proc.returncode == -signal.SIGKILL



def test_kill_during_an_incremental_invocation_then_rerun_equals_fresh(scene, tmp_path):
    run_dir = tmp_path / "killed"
    assert run_once(run_dir, [scene["centre"]]).ok
    lines = [scene["centre"], scene["southeast"], scene["northwest"]]
    db = run_dir / "ledger.sqlite"

    def recorded() -> bool:  # kill once a few tiles of the second invocation are recorded
        con = sqlite3.connect(str(db), timeout=30)
        try:
            return con.execute("SELECT COUNT(*) FROM history WHERE invocation=(SELECT MAX(invocation) FROM "
                               "invocations)").fetchone()[0] >= 5
        finally:
            con.close()

    _kill_when([str(run_dir), *map(str, lines), "--sleep", "0.08"], recorded, 0.05)
    r = run_once(run_dir, lines)
    assert r.ok
    fresh = tmp_path / "fresh"
    assert fresh_with_models(fresh, run_dir, lines).ok
    _assert_same(_arrays(run_dir), _arrays(fresh))


def main(argv: list[str] | None = None) -> int:
    import argparse

    sys.path.insert(0, str(Path(__file__).resolve().parent))
    from engine_script import SlowLocalExecutor

    p = argparse.ArgumentParser()
    p.add_argument("run_dir")
    p.add_argument("lines", nargs="+")
    p.add_argument("--sleep", type=float, default=0.0)
    p.add_argument("--mode", default="frozen")
    a = p.parse_args(argv)
    ex = SlowLocalExecutor(a.sleep) if a.sleep > 0 else LocalExecutor()
    res = run_once(Path(a.run_dir), [Path(x) for x in a.lines], executor=ex, mode=a.mode)
    return 0 if res.ok else 1


if __name__ == "__main__":
    sys.exit(main())


# ------------------------------------------------------------------------------- store growth


def test_store_growth_interrupted_midway_is_finished_by_the_next_call(tmp_path):
    """A kill between moving shard files and shifting the ledger: the journal lets a second call finish."""
    from swathmill.tiles.incremental import regrid_store
    from swathmill.tiles.step import OutputSpec
    from swathmill.tiles.store import StoreLayout, create_store

    old = Grid(32, 32, Affine(RES, 0, 500080.0, 0, -RES, 4000000.0), CRS)
    new = Grid(64, 48, Affine(RES, 0, 500000.0, 0, -RES, 4000080.0), CRS)  # grown west and north
    spec = {"out": OutputSpec(bands=("a", "b"), dtype="int16", nodata=-1)}
    layout = StoreLayout(shard=TILE, chunk=TILE)
    path = tmp_path / "s.zarr"
    st = create_store(path, old, spec, layout)
    data = np.arange(2 * 32 * 32, dtype=np.int16).reshape(2, 32, 32)
    st.write("out", old.full, data)
    st.write_valid(old.full, np.ones((32, 32), bool))
    shifts = []

    def killed(di, dj):
        raise KeyboardInterrupt("killed")

    with pytest.raises(KeyboardInterrupt):
        regrid_store(path, old, new, TILE, spec, layout, {}, on_moved=killed)
    assert (tmp_path / "s.zarr.regrid.json").is_file()
    regrid_store(path, old, new, TILE, spec, layout, {}, on_moved=lambda di, dj: shifts.append((di, dj)))
    assert shifts == [(1, 1)] and not (tmp_path / "s.zarr.regrid.json").exists()
    grown = open_store(path)
    assert grown.grid == new
    got = grown.read("out", new.full)
    # the old grid's corner is 1 tile (80 m) down and 1 tile right of the new one's
    assert np.array_equal(got[:, 16:48, 16:48], data)
    assert np.all(got[:, :16] == -1) and np.all(got[:, :, :16] == -1) and np.all(got[:, 48:] == -1)
    assert grown.read_valid(new.full).sum() == 32 * 32


# ------------------------------------------------------------------------------------ refit mode


class CountingExecutor(LocalExecutor):
    """The in-process loop, counting the accumulator tasks it runs (per step)."""

    def __init__(self):
        super().__init__()
        self.accumulated: dict[str, list] = {}

    def _count(self, fn, items):
        from swathmill.tiles.tasks import run_accumulate

        items = list(items)
        if fn is run_accumulate:
            for t in items:
                self.accumulated.setdefault(t.step.name, []).append(t.index)
        return items

    def map(self, fn, items, on_done, on_error) -> None:
        super().map(fn, self._count(fn, items), on_done, on_error)

    def reduce(self, fn, items, merge):
        return super().reduce(fn, self._count(fn, items), merge)


def _acc_files(run_dir: Path, step: str) -> dict[str, tuple[int, bytes]]:
    d = refit_model_dir(run_dir) / "accumulators" / step
    return {p.name: (p.stat().st_mtime_ns, p.read_bytes()) for p in sorted(d.iterdir())}


def _models(run_dir: Path, folder: Path) -> dict[str, tuple[dict, dict]]:
    """The fitted models of the mosaic and the MNF in ``folder``: (JSON values, arrays as bytes)."""
    out = {}
    for step in ("mosaic", "mnf"):
        ptr = folder / f"{step}.current"
        base = folder / ptr.read_text().split()[0] if ptr.is_file() else next(iter(sorted(folder.glob(f"{step}-*.json"))))
        with np.load(base.with_suffix(".npz"), allow_pickle=False) as z:
            arrays = {k: (z[k].dtype.str, z[k].shape, z[k].tobytes()) for k in z.files}
        out[step] = (json.loads(base.with_suffix(".json").read_text()), arrays)
    return out


def test_refit_lines_added_in_three_invocations_equal_a_fresh_run(scene, tmp_path):
    run_dir = tmp_path / "growing"
    order = [scene["centre"], scene["southeast"], scene["northwest"]]
    assert run_once(run_dir, order[:1], mode="refit").ok
    # second invocation (east and south): the MNF fit reads again only the tiles whose input changed
    before = _acc_files(run_dir, "mnf")
    ex = CountingExecutor()
    r2 = run_once(run_dir, order[:2], executor=ex, mode="refit")
    assert r2.ok and {s.name: s.fit for s in r2.steps}["mnf"] == "refitted"
    redone = ex.accumulated["mnf"]
    total = campaign_history(run_dir)[-1]["fits"]["mnf"]["tiles"]
    assert 0 < len(redone) < total
    after = _acc_files(run_dir, "mnf")
    kept = [n for n in before if n in after and after[n] == before[n]]
    assert len([n for n in kept if n.endswith(".json")]) == total - len(redone)
    r3 = run_once(run_dir, order, mode="refit")
    assert r3.ok
    mos = {s.name: s for s in r3.steps}["mosaic"]
    assert 0 < mos.computed < mos.total  # tiles that only the far corner's lines do not touch are kept

    fresh = tmp_path / "fresh"
    rf = run_once(fresh, order, mode="refit")
    assert rf.ok
    _assert_same(_arrays(run_dir), _arrays(fresh))
    # the refitted models equal those of an ordinary run over all lines, byte for byte (the same
    # pairwise merge tree over the same tiles)
    plain = tmp_path / "plain"
    with Run(plain, RunOptions(tile=TILE, chunk=TILE, export=False)) as run:
        assert run.execute(_steps(order), LocalExecutor()).ok
    assert _models(run_dir, refit_model_dir(run_dir)) == _models(plain, plain / "models")
    hist = campaign_history(run_dir)
    assert all(h["mode"] == "refit" and h["fits"]["mnf"]["mode"] == "refit" for h in hist)
    assert "refitted exactly" in campaign_notes(run_dir)[-1]

    # nothing changed: nothing is accumulated, the models hash the same, no tile is recomputed
    ex = CountingExecutor()
    r4 = run_once(run_dir, order, executor=ex, mode="refit")
    assert r4.ok and ex.accumulated == {} and all(s.computed == 0 for s in r4.steps)
    assert {f["model"] for f in campaign_history(run_dir)[-1]["fits"].values()} == {"unchanged"}


def test_refit_reflown_line_recomputes_the_lines_whose_correction_changed(scene, tmp_path):
    run_dir = tmp_path / "reflown"
    assert run_once(run_dir, [scene["centre"], scene["southeast"]], mode="refit").ok
    reflown = _line(tmp_path, "southeast", slice(48, 80), slice(68, 108), 1.1, -0.006, 9, folder="reflown")
    lines = [scene["centre"], reflown]
    r2 = run_once(run_dir, lines, mode="refit")
    assert r2.ok and any("'southeast' reflown" in m for m in r2.messages)
    mos = {s.name: s for s in r2.steps}["mosaic"]
    # the reference line keeps gain 1: tiles read by it alone keep their key and their bytes
    assert 0 < mos.computed < mos.total
    fresh = tmp_path / "fresh"
    assert run_once(fresh, lines, mode="refit").ok
    _assert_same(_arrays(run_dir), _arrays(fresh))
    new = _arrays(run_dir)
    grid = open_store(run_dir / "stores" / "mosaic.zarr").grid
    x, y = T0 @ (110.5, 42.5)  # covered by the old southeast line only (see the frozen test)
    c, r = (int(v) for v in ~grid.transform @ (x, y))
    assert new["mosaic/source"][0, r, c] == 0 and new["mosaic/valid"][r, c] == 0


def _written_since(folder: Path, start: int) -> int:
    """Finished accumulator files in ``folder`` written since ``start`` (ns); a temporary file being
    renamed while the folder is listed is not one (and may be gone by the time it is looked at)."""
    n = 0
    for p in folder.glob("*.json"):
        if p.name.endswith(".tmp.json"):
            continue
        try:
            n += p.stat().st_mtime_ns > start
        except FileNotFoundError:
            pass
    return n


def test_kill_during_a_refit_invocation_then_rerun_equals_fresh(scene, tmp_path):
    run_dir = tmp_path / "killed"
    assert run_once(run_dir, [scene["centre"]], mode="refit").ok
    lines = [scene["centre"], scene["southeast"], scene["northwest"]]
    accs = refit_model_dir(run_dir) / "accumulators" / "mnf"
    start = time.time_ns()
    # kill while the MNF fit keeps its accumulator results (after the mosaic's tiles)
    _kill_when([str(run_dir), *map(str, lines), "--sleep", "0.08", "--mode", "refit"],
               lambda: _written_since(accs, start) >= 3, 0.02)
    r = run_once(run_dir, lines, mode="refit")
    assert r.ok
    fresh = tmp_path / "fresh"
    assert run_once(fresh, lines, mode="refit").ok
    _assert_same(_arrays(run_dir), _arrays(fresh))


def test_refit_refuses_a_corrupted_or_foreign_accumulator_file(scene, tmp_path):
    from swathmill.tiles.accstore import AccumulatorError

    run_dir = tmp_path / "bad"
    lines = [scene["centre"], scene["southeast"]]
    assert run_once(run_dir, lines, mode="refit").ok
    accs = refit_model_dir(run_dir) / "accumulators" / "mnf"
    victim = sorted(accs.glob("*.json"))[0]
    # a corrupted arrays file: its bytes no longer match the hash its description records
    npz = accs / json.loads(victim.read_text())["npz"]
    npz.write_bytes(npz.read_bytes()[:-7] + b"garbage")
    with pytest.raises(AccumulatorError, match=victim.name):
        run_once(run_dir, lines, mode="refit")
    # a foreign file in its place (another step's description)
    other = sorted((refit_model_dir(run_dir) / "accumulators" / "mosaic").glob("*.json"))[0]
    victim.write_text(other.read_text())
    with pytest.raises(AccumulatorError, match=f"{victim.name}.*describes step 'mosaic'"):
        run_once(run_dir, lines, mode="refit")
    victim.write_text("{not json")
    with pytest.raises(AccumulatorError, match=f"{victim.name}.*not readable JSON"):
        run_once(run_dir, lines, mode="refit")


def test_accumulator_results_round_trip_without_pickle_and_others_are_refused(tmp_path):
    from swathmill.tiles.accstore import AccumulatorError, AccumulatorFiles
    from swathmill.workflows.methods.mnf import Moments

    files = AccumulatorFiles(tmp_path, "s")
    acc = {("vertical", 3, -2): Moments(4, np.arange(3.0), np.eye(3)), "k": [1, 2.5, float("nan"), None, True],
           7: (np.float32(0.1), "x", np.array(["a", "b"])), "empty": {}}
    files.save((-1, 5), "key1", acc)
    got = files.load((-1, 5), "key1")
    assert list(got) == list(acc) and type(got[7][0]) is np.float32 and got[7][0] == np.float32(0.1)
    m = got[("vertical", 3, -2)]
    assert isinstance(m, Moments) and m.n == 4 and m.mean.tobytes() == np.arange(3.0).tobytes()
    assert got["k"][:2] == [1, 2.5] and np.isnan(got["k"][2]) and got["k"][3:] == [None, True]
    assert files.key((-1, 5)) == "key1"
    with pytest.raises(AccumulatorError, match=r"tile \[0, 0\].*cannot be stored"):
        files.save((0, 0), "k", {"a": {1, 2}})
    with pytest.raises(AccumulatorError, match="dtype object"):
        files.save((0, 0), "k", {"a": np.array([{}], dtype=object)})
    # an arrays file holding a pickled object is refused when read (numpy's allow_pickle=False)
    head = json.loads((tmp_path / "acc_-1_5.json").read_text())
    np.savez(tmp_path / head["npz"], a0=np.array([{}], dtype=object))
    import hashlib
    head["npz_sha256"] = hashlib.sha256((tmp_path / head["npz"]).read_bytes()).hexdigest()
    (tmp_path / "acc_-1_5.json").write_text(json.dumps(head))
    with pytest.raises(AccumulatorError, match="acc_-1_5.json.*without pickle"):
        files.load((-1, 5), "key1")


def test_engine_section_offers_the_refit_mode():
    from pydantic import ValidationError

    from swathmill.workflows.app.config import EngineConfig
    from swathmill.tiles.incremental import MODES

    assert EngineConfig(incremental="refit").incremental == "refit" and "refit" in MODES
    assert EngineConfig.model_validate({"incremental": False}).incremental == "off"  # YAML's bare off
    with pytest.raises(ValidationError, match="refit"):
        EngineConfig(incremental="refitted")
