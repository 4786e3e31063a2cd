"""Resume: a run killed with SIGKILL and run again gives the same products and recomputes only the
unfinished tiles; torn shards and stale partial writes are repaired; the run lock; invalidation;
a failed tile is reported and the next run recomputes only it."""
from __future__ import annotations

import json
import os
import signal
import socket
import sqlite3
import subprocess
import sys
import time
import uuid
from pathlib import Path

import numpy as np
import pytest
import rasterio

import engine_script as es
from swathmill.tiles.executors import LocalExecutor
from swathmill.tiles.grid import Tiling
from swathmill.tiles.ledger import Ledger
from swathmill.tiles.lock import RunLock, RunLockedError
from swathmill.tiles.ops import mean_filter_step
from swathmill.tiles.run import Run, RunOptions, run_status
from swathmill.tiles.store import open_store
from swathmill.tiles.testing import read_output

ROOT = Path(__file__).resolve().parents[1]
SCRIPT = Path(__file__).resolve().parent / "engine_script.py"
PYTHON = sys.executable


def _script(run_dir: Path, *args: str) -> subprocess.Popen:
    """Start tests/engine_script.py on ``run_dir`` in a new process (stdout and stderr to files)."""
    base = run_dir.with_name(f"{run_dir.name}-{uuid.uuid4().hex[:6]}")
    with open(f"{base}.out", "w") as out, open(f"{base}.err", "w") as err:
        proc = subprocess.Popen([PYTHON, str(SCRIPT), str(run_dir), *args], cwd=ROOT, stdout=out, stderr=err)
    proc.logs = base  # type: ignore[attr-defined]
    return proc


def _finish(proc: subprocess.Popen, timeout: float = 180) -> tuple[int, str, str]:
    """Wait for the process (killing it after ``timeout`` s); its return code, stdout and stderr."""
    try:
        rc = proc.wait(timeout=timeout)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    base = proc.logs  # type: ignore[attr-defined]
    return rc, Path(f"{base}.out").read_text(), Path(f"{base}.err").read_text()


def _done_count(ledger: Path) -> int:
    if not ledger.is_file():
        return 0
    try:
        db = sqlite3.connect(f"file:{ledger}?mode=ro", uri=True, timeout=1)
        try:
            return db.execute("SELECT count(*) FROM tiles WHERE status='done'").fetchone()[0]
        finally:
            db.close()
    except sqlite3.Error:
        return 0


def _history(run_dir: Path) -> dict[str, dict[str, set[tuple[int, int]]]]:
    """invocation -> step -> tiles recorded finished by that invocation."""
    led = Ledger(run_dir / "ledger.sqlite")
    try:
        out: dict = {}
        for h in led.history():
            if h["status"] == "done":
                out.setdefault(h["invocation"], {}).setdefault(h["name"], set()).add((h["i"], h["j"]))
        return out
    finally:
        led.close()


def _created_free_bytes(path: Path) -> bytes:
    """The file's bytes with its 'created' tag value replaced by a placeholder of the same length."""
    with rasterio.open(path) as ds:
        created = ds.tags()["created"]
    data = path.read_bytes()
    assert data.count(created.encode()) == 1
    return data.replace(created.encode(), b"#" * len(created))


def _assert_same_products(a: Path, b: Path) -> None:
    names = sorted(p.name for p in a.glob("*.tif"))
    assert names and names == sorted(p.name for p in b.glob("*.tif"))
    for name in names:
        with rasterio.open(a / name) as da, rasterio.open(b / name) as db:
            assert np.array_equal(da.read(), db.read(), equal_nan=True), name
            ta, tb = da.tags(), db.tags()
            ta.pop("created"), tb.pop("created")
            assert ta == tb, name
            assert [da.tags(i + 1) for i in range(da.count)] == [db.tags(i + 1) for i in range(db.count)]
            pa, pb = dict(da.profile), dict(db.profile)
            assert np.array_equal(pa.pop("nodata"), pb.pop("nodata"), equal_nan=True) and pa == pb, name
        # byte for byte, once the processing time is masked
        assert _created_free_bytes(a / name) == _created_free_bytes(b / name), f"{name} differs in bytes"
        ia = json.loads((a / f"{name}.json").read_text())
        ib = json.loads((b / f"{name}.json").read_text())
        for item in (ia, ib):
            for props in (item["properties"], item["assets"]["data"]):
                props.pop("created", None)
                props.pop("datetime", None)
                props.pop("processing:datetime", None)
        assert ia == ib, name


def test_killed_run_resumes_to_identical_products_recomputing_only_unfinished_tiles(
        tmp_path: Path, rng: np.random.Generator) -> None:
    # the reference: one uninterrupted run (in this process)
    ref = es.run_pipeline(tmp_path / "ref", LocalExecutor())
    assert ref.ok
    totals = {s.name: s.total for s in ref.steps}
    n_total = sum(totals.values())

    # kill -9 at a random point: once K tiles are recorded, K inside a step, not at its ends
    run_dir = tmp_path / "run"
    per_step = totals["scaled"]
    k = int(rng.integers(1, len(totals) - 1)) * per_step + int(rng.integers(4, per_step - 4))
    assert 0 < k < n_total
    proc = _script(run_dir, "--sleep", "0.04")
    deadline = time.monotonic() + 120
    while _done_count(run_dir / "ledger.sqlite") < k:
        assert proc.poll() is None, f"the run ended before the kill: {_finish(proc)}"
        assert time.monotonic() < deadline, "the run did not reach the kill point in time"
        time.sleep(0.003)
    proc.send_signal(signal.SIGKILL)
    rc, _out, _err = _finish(proc)
    assert rc == -signal.SIGKILL
    assert (run_dir / "run.lock").exists()  # left behind by the killed process

    first = _history(run_dir)
    assert len(first) == 1
    done1 = next(iter(first.values()))
    assert k <= sum(map(len, done1.values())) < n_total

    # the step the kill interrupted: recorded in the ledger, some tiles finished, some not
    led = Ledger(run_dir / "ledger.sqlite")
    steps_seen = {s["name"]: s for s in led.steps()}
    led.close()
    cut = [n for n in totals if n in steps_seen and 0 < len(done1.get(n, ())) < totals[n]]
    assert len(cut) == 1, (cut, {n: len(v) for n, v in done1.items()})
    cut = cut[0]
    store = open_store(run_dir / "stores" / f"{cut}.zarr")
    tiling = Tiling(store.grid, 16)
    unfinished = [t for t in tiling if t.index not in done1[cut]]
    torn = unfinished[int(rng.integers(len(unfinished)))]
    # a torn shard: garbage where the shard of an unfinished tile is (as a cut-off write leaves it)
    arr, key = store.shard_keys(torn.core)[0]
    shard_file = store.path / arr.path / key
    shard_file.parent.mkdir(parents=True, exist_ok=True)
    shard_file.write_bytes(rng.integers(0, 256, 700, dtype=np.uint8).tobytes())
    assert not store.check_readable("output", torn.core)
    # stale partial writes, as zarr's local store leaves them after a kill
    partials = [shard_file.with_suffix(f".{uuid.uuid4().hex}.partial"),
                store.path / "valid" / "c" / f"0.{uuid.uuid4().hex}.partial"]
    for p in partials:
        p.parent.mkdir(parents=True, exist_ok=True)
        p.write_bytes(b"half a shard")

    # run again: it takes over the stale lock, repairs, finishes
    rc, out, err = _finish(_script(run_dir))
    assert rc == 0, err[-3000:]
    summary = json.loads(out.strip().splitlines()[-1])
    assert summary["ok"]
    assert any(f"step '{cut}', {torn.name}: unreadable shard" in m for m in summary["messages"]), summary["messages"]
    assert not any(p.exists() for p in partials)
    assert store.check_readable("output", torn.core)

    # the ledger: the second invocation computed exactly the tiles the first did not finish
    hist = _history(run_dir)
    assert len(hist) == 2
    (inv2,) = set(hist) - set(first)
    done2 = hist[inv2]
    every = {t.index for t in tiling}
    for name in totals:
        assert done2.get(name, set()) == every - done1.get(name, set()), name
        assert not done2.get(name, set()) & done1.get(name, set())
    reports = {s["name"]: s for s in summary["steps"]}
    for name, total in totals.items():
        assert reports[name]["done_before"] == len(done1.get(name, ()))
        assert reports[name]["computed"] == total - reports[name]["done_before"]

    # products: identical to the uninterrupted run's (pixels, tags but 'created', bytes, STAC items)
    _assert_same_products(tmp_path / "ref" / "products", run_dir / "products")
    for name in totals:
        a = read_output(tmp_path / "ref", f"{name}/output", raw=True)
        b = read_output(run_dir, f"{name}/output", raw=True)
        assert a.dtype == b.dtype and a.tobytes() == b.tobytes(), name


# the run lock ---------------------------------------------------------------------------------------
def test_second_process_on_the_same_run_is_refused(tmp_path: Path) -> None:
    run_dir = tmp_path / "run"
    with Run(run_dir, RunOptions(tile=16)):
        rc, _out, err = _finish(_script(run_dir, "--no-export"))
    assert rc != 0
    assert "RunLockedError" in err
    assert f"in use by process {os.getpid()} on host {socket.gethostname()}" in err
    led = Ledger(run_dir / "ledger.sqlite")
    try:
        assert led.history() == [] and led.steps() == []
    finally:
        led.close()


def test_lock_names_holder_and_stale_locks_are_taken_over(tmp_path: Path) -> None:
    lock_path = tmp_path / "run" / "run.lock"
    # a holder that died without releasing (os._exit skips every clean-up)
    code = ("import os, sys; from swathmill.tiles.lock import RunLock; "
            "RunLock(__import__('pathlib').Path(sys.argv[1])).acquire(); print(os.getpid(), flush=True); os._exit(0)")
    res = subprocess.run([PYTHON, "-c", code, str(lock_path)], cwd=ROOT, capture_output=True, text=True, timeout=60)
    dead_pid = int(res.stdout.strip())
    assert json.loads(lock_path.read_text())["pid"] == dead_pid
    with pytest.raises(ProcessLookupError):
        os.kill(dead_pid, 0)
    with Run(tmp_path / "run", RunOptions(tile=16)):
        holder = json.loads(lock_path.read_text())
        assert holder["pid"] == os.getpid() and holder["host"] == socket.gethostname()
        # while we hold it, another lock on the same file is refused, naming us
        with pytest.raises(RunLockedError, match=rf"in use by process {os.getpid()} on host "
                                                  rf"{socket.gethostname()}"):
            RunLock(lock_path).acquire()
    assert not lock_path.exists()

    # a holder on another host: refused while its heartbeat is fresh, taken over once stale
    lock_path.write_text(json.dumps({"host": "elsewhere.example", "pid": 4242, "token": "x",
                                     "started": "2026-01-01T00:00:00+0000"}))
    with pytest.raises(RunLockedError, match=r"in use by process 4242 on host elsewhere.example"):
        RunLock(lock_path, stale_after=60).acquire()
    old = time.time() - 600
    os.utime(lock_path, (old, old))
    lock = RunLock(lock_path, stale_after=60)
    lock.acquire()
    assert json.loads(lock_path.read_text())["pid"] == os.getpid()
    lock.release()


# invalidation ---------------------------------------------------------------------------------------
def test_changed_parameter_invalidates_that_step_and_downstream_only(tmp_path: Path) -> None:
    run_dir = tmp_path / "run"

    def run(**kw) -> dict:
        r = es.run_pipeline(run_dir, LocalExecutor(), tile=32, export=True, **kw)
        assert r.ok
        return {s.name: s for s in r.steps}

    first = run(size=5)
    assert all(s.computed == s.total and s.invalidated is None for s in first.values())
    products = {p.name: p.stat().st_mtime_ns for p in (run_dir / "products").glob("*.tif")}

    again = run(size=5)  # unchanged: everything resumed, nothing computed, fit loaded
    assert all(s.computed == 0 and s.done_before == s.total and s.invalidated is None for s in again.values())
    assert again["centred"].fit == "loaded"
    assert {p.name: p.stat().st_mtime_ns for p in (run_dir / "products").glob("*.tif")} == products

    changed = run(size=3)  # the mean filter's size: it and everything after it are redone
    assert changed["scaled"].invalidated is None and changed["scaled"].computed == 0
    for name in ("smooth", "centred", "classes", "cleaned"):
        assert changed[name].invalidated is not None, name
        assert changed[name].done_before == 0 and changed[name].computed == changed[name].total
        assert changed[name].key != first[name].key
    assert changed["centred"].fit == "fitted"
    assert changed["scaled"].key == first["scaled"].key
    # the outputs are those of a fresh run with the new parameter
    fresh = es.run_pipeline(tmp_path / "fresh", LocalExecutor(), tile=32, export=False, size=3)
    assert fresh.ok
    for name in ("smooth", "cleaned"):
        assert np.array_equal(read_output(run_dir, f"{name}/output", raw=True),
                              read_output(tmp_path / "fresh", f"{name}/output", raw=True), equal_nan=True)
    assert (run_dir / "products" / "scaled__output.tif").stat().st_mtime_ns == products["scaled__output.tif"]
    assert (run_dir / "products" / "smooth__output.tif").stat().st_mtime_ns != products["smooth__output.tif"]

    last = run(size=3, modal_size=3)  # only the last step
    assert [n for n, s in last.items() if s.invalidated] == ["cleaned"]


# a failing tile ---------------------------------------------------------------------------------------
def test_failed_tile_is_reported_others_kept_and_only_it_recomputed(tmp_path: Path,
                                                                    monkeypatch: pytest.MonkeyPatch) -> None:
    run_dir = tmp_path / "run"
    src = es.make_source(tmp_path / "src.zarr", rows=48, cols=48, bands=2, shard=16)
    steps = [es.failing_step("copy", "src/refl"), mean_filter_step("smooth", "copy/output", size=5)]
    monkeypatch.setattr(es, "FAIL_TILES", {(1, 2)})
    with Run(run_dir, RunOptions(tile=16, export=False)) as run:
        result = run.execute(steps, LocalExecutor(), sources={"src": src})
    assert not result.ok and result.stopped_at == "copy"
    rep = result.steps[0]
    assert set(rep.failed) == {(1, 2)}
    assert "step 'copy', tile(1, 2)" in rep.failed[(1, 2)] and "deliberate failure" in rep.failed[(1, 2)]
    assert rep.computed == rep.total - 1 == 8
    assert len(result.steps) == 1 and any("not started: smooth" in m for m in result.messages)
    status = {s["step"]: s for s in run_status(run_dir)}
    assert status["copy"]["done"] == 8 and status["copy"]["failed"] == 1
    assert "deliberate failure" in status["copy"]["errors"]["1,2"]

    monkeypatch.setattr(es, "FAIL_TILES", set())
    with Run(run_dir, RunOptions(tile=16, export=False)) as run:
        result = run.execute(steps, LocalExecutor(), sources={"src": src})
    assert result.ok
    assert result.steps[0].done_before == 8 and result.steps[0].computed == 1
    hist = _history(run_dir)
    assert len(hist) == 2
    second = [v for v in hist.values() if "smooth" in v][0]
    assert second["copy"] == {(1, 2)}
    cube, valid = es.make_cube(48, 48, 2, 7)
    want = np.where(valid, cube[0] * 1e-4 * 1.0, np.nan)[None]
    np.testing.assert_allclose(read_output(run_dir, "copy/output"), want, rtol=1e-6, equal_nan=True)
