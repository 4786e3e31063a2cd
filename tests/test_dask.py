"""The Dask executor against the in-process reference: identical stores (byte for byte), the same fit
merge tree, failed tiles reported by tile, and a run on a real `dask scheduler` + `dask worker`."""
from __future__ import annotations

import hashlib
import json
import os
import signal
import socket
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import zarr

import engine_script as es
from swathmill.tiles.executors import DaskExecutor, LocalExecutor
from swathmill.tiles.run import run_status

TESTS = Path(__file__).resolve().parent
BIN = Path(sys.executable).parent


@pytest.fixture(scope="module")
def dask_executor():
    """A LocalCluster of 2 worker processes (started by spawn), 1 thread each."""
    ex = DaskExecutor(n_workers=2, threads_per_worker=1)
    try:
        yield ex
    finally:
        ex.close()


def _store_files(run_dir: Path) -> dict[str, str]:
    root = run_dir / "stores"
    return {str(p.relative_to(root)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(root.rglob("*")) if p.is_file()}


def _assert_identical_stores(a: Path, b: Path) -> None:
    """Every array of every store equal byte for byte, and every stored object identical."""
    names = sorted(p.name for p in (a / "stores").glob("*.zarr"))
    assert names and names == sorted(p.name for p in (b / "stores").glob("*.zarr"))
    for name in names:
        ga, gb = zarr.open_group(str(a / "stores" / name), mode="r"), zarr.open_group(str(b / "stores" / name), mode="r")
        arrays = sorted(k for k, _ in ga.arrays())
        assert arrays == sorted(k for k, _ in gb.arrays())
        assert "valid" in arrays and "output" in arrays
        for k in arrays:
            xa, xb = ga[k][...], gb[k][...]
            assert xa.dtype == xb.dtype and xa.shape == xb.shape, (name, k)
            assert xa.tobytes() == xb.tobytes(), f"{name}/{k} differs"
        assert dict(ga.attrs) == dict(gb.attrs), name
    fa, fb = _store_files(a), _store_files(b)
    assert fa.keys() == fb.keys()
    assert [k for k in fa if fa[k] != fb[k]] == []


def test_dashboard_is_bound_to_localhost(dask_executor: DaskExecutor) -> None:
    assert len(dask_executor.client.nthreads()) == 2
    if dask_executor.dashboard:
        assert "127.0.0.1" in dask_executor.dashboard


def test_local_and_dask_give_identical_stores(tmp_path: Path, dask_executor: DaskExecutor) -> None:
    local = es.run_pipeline(tmp_path / "local", LocalExecutor(), export=False)
    dask = es.run_pipeline(tmp_path / "dask", dask_executor, export=False)
    assert local.ok and dask.ok
    assert [(s.name, s.key, s.computed) for s in local.steps] == [(s.name, s.key, s.computed) for s in dask.steps]
    _assert_identical_stores(tmp_path / "local", tmp_path / "dask")
    models = sorted(p.name for p in (tmp_path / "local" / "models").iterdir())
    assert models == sorted(p.name for p in (tmp_path / "dask" / "models").iterdir())
    for m in models:
        assert (tmp_path / "local" / "models" / m).read_bytes() == (tmp_path / "dask" / "models" / m).read_bytes()


def test_fit_merges_in_the_same_tree_on_dask(tmp_path: Path, dask_executor: DaskExecutor) -> None:
    """Accumulators finish out of order on 2 workers; the merge tree must still be the loop's."""
    trees = []
    for name, ex in (("local", LocalExecutor()), ("dask", dask_executor)):
        r = es.run_pipeline(tmp_path / name, ex, steps=[es.merge_order_step("order", "src/refl")], export=False)
        assert r.ok
        (model,) = (tmp_path / name / "models").glob("*.json")
        trees.append(json.loads(model.read_text())["tree"])
    # the in-process loop pairs neighbours level by level: ((0.0 0.1) (0.2 0.3)) ...
    assert trees[0].startswith("(((((0.0 0.1) (0.2 0.3)) ((0.4 1.0) (1.1 1.2)))")
    assert trees[1] == trees[0]


def test_failed_tile_on_dask_is_reported_by_tile(tmp_path: Path, dask_executor: DaskExecutor) -> None:
    steps = es.build_steps()[:1] + [es.failing_step("copy", "scaled/output", fail=[(1, 3)])]
    result = es.run_pipeline(tmp_path / "run", dask_executor, steps=steps, export=False)
    assert not result.ok and result.stopped_at == "copy"
    rep = result.steps[1]
    assert list(rep.failed) == [(1, 3)]
    assert "step 'copy', tile(1, 3)" in rep.failed[(1, 3)] and "deliberate failure" in rep.failed[(1, 3)]
    assert rep.computed == rep.total - 1
    status = {s["step"]: s for s in run_status(tmp_path / "run")}
    assert status["copy"]["failed"] == 1 and status["copy"]["done"] == rep.total - 1


# a real scheduler and workers started from the command line ------------------------------------------
def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _stop(proc: subprocess.Popen) -> None:
    if proc.poll() is None:
        proc.send_signal(signal.SIGTERM)
        try:
            proc.wait(timeout=20)
        except subprocess.TimeoutExpired:
            os.killpg(proc.pid, signal.SIGKILL)  # its own session: the group of this one process tree
            proc.wait()


@pytest.fixture(scope="module")
def cli_cluster(tmp_path_factory: pytest.TempPathFactory):
    """`dask scheduler` and `dask worker --nworkers 2 --nthreads 1` on 127.0.0.1 (random free port)."""
    work = tmp_path_factory.mktemp("cli-cluster")
    port = _free_port()
    address = f"tcp://127.0.0.1:{port}"
    path = [str(TESTS), *filter(None, os.environ.get("PYTHONPATH", "").split(os.pathsep))]
    env = {**os.environ, "PYTHONPATH": os.pathsep.join(path)}
    procs: list[subprocess.Popen] = []
    logs = [open(work / "scheduler.log", "w"), open(work / "worker.log", "w")]
    try:
        procs.append(subprocess.Popen(
            [str(BIN / "dask"), "scheduler", "--host", "127.0.0.1", "--port", str(port), "--no-dashboard"],
            cwd=work, env=env, stdout=logs[0], stderr=subprocess.STDOUT, start_new_session=True))
        procs.append(subprocess.Popen(
            [str(BIN / "dask"), "worker", address, "--nworkers", "2", "--nthreads", "1", "--host", "127.0.0.1",
             "--no-dashboard", "--local-directory", str(work)],
            cwd=work, env=env, stdout=logs[1], stderr=subprocess.STDOUT, start_new_session=True))
        from distributed import Client

        deadline = time.monotonic() + 90
        while True:
            try:
                with Client(address, timeout="5s") as c:
                    c.wait_for_workers(2, timeout=60)
                    break
            except OSError:
                if time.monotonic() > deadline or any(p.poll() is not None for p in procs):
                    raise RuntimeError(f"the dask cluster did not start: {(work / 'scheduler.log').read_text()}"
                                       f"{(work / 'worker.log').read_text()}") from None
                time.sleep(0.5)
        yield address
    finally:
        for p in reversed(procs):
            _stop(p)
        for f in logs:
            f.close()


def test_run_on_a_scheduler_and_workers_started_by_hand(tmp_path: Path, cli_cluster: str) -> None:
    from rio_cogeo.cogeo import cog_validate

    ex = DaskExecutor(address=cli_cluster)
    try:
        workers = ex.client.scheduler_info()["workers"]
        assert len(workers) == 2 and all(w["host"] == "127.0.0.1" for w in workers.values())
        remote = es.run_pipeline(tmp_path / "remote", ex, export=True)
        pids = set(ex.client.run(os.getpid).values())
    finally:
        ex.close()
    assert remote.ok, remote.messages
    assert os.getpid() not in pids and len(pids) == 2
    local = es.run_pipeline(tmp_path / "local", LocalExecutor(), export=False)
    assert local.ok
    _assert_identical_stores(tmp_path / "local", tmp_path / "remote")
    products = sorted((tmp_path / "remote" / "products").glob("*.tif"))
    assert len(products) == len(remote.steps)
    for p in products:
        assert cog_validate(p, quiet=True)[0], p.name
        assert (p.parent / f"{p.name}.json").is_file()


def test_local_cluster_workers_get_the_allocator_settings(dask_executor) -> None:
    from swathmill.tiles.executors import WORKER_MALLOC_ENV

    # the variables glibc reads at start-up (mallopt(3)); Dask's own default would give 65536
    seen = dask_executor.client.run(lambda: {k: os.environ.get(k) for k in WORKER_MALLOC_ENV})
    assert len(seen) == 2
    assert all(env == WORKER_MALLOC_ENV for env in seen.values()), seen


def _slow_square(x: int) -> int:
    time.sleep(0.3 if x == 0 else 0.0)
    if x == 3:
        raise ValueError("three is refused")
    return x * x


def test_background_tasks_are_collected_as_they_land(dask_executor: DaskExecutor) -> None:
    bg = dask_executor.submit(_slow_square, [0, 1, 2, 3])
    assert bg.pending == 4  # submit returns at once
    done, failed = [], []
    bg.collect(lambda item, res: done.append((item, res)), lambda item, exc, tb: failed.append((item, str(exc))),
               wait=True)
    assert bg.pending == 0
    assert done == [(0, 0), (1, 1), (2, 4)] and failed == [(3, "three is refused")]


def test_products_on_dask_are_written_while_the_run_goes_on_and_match_the_local_run(tmp_path: Path,
                                                                                     dask_executor) -> None:
    """On Dask the products are written in the background; when the run returns every one has landed,
    is recorded in the ledger with its export time, and is the same raster as the local run's."""
    import rasterio

    from swathmill.tiles.ledger import Ledger

    local = es.run_pipeline(tmp_path / "local", LocalExecutor())
    dask = es.run_pipeline(tmp_path / "dask", dask_executor)
    assert local.ok and dask.ok
    for a, b in zip(local.steps, dask.steps):
        assert sorted(Path(p).name for p in a.products) == sorted(Path(p).name for p in b.products) != []
        for pa in a.products:
            pb = tmp_path / "dask" / "products" / Path(pa).name
            with rasterio.open(pa) as ra, rasterio.open(pb) as rb:
                assert ra.read().tobytes() == rb.read().tobytes()
    led = Ledger(tmp_path / "dask" / "ledger.sqlite")
    try:
        for s in dask.steps:
            for p in s.products:
                name = Path(p).stem.split("__", 1)[1]
                assert led.product(s.name, name)[0] == s.key
        phases = {(n, ph) for n, ph, _s in led.db.execute("SELECT name, phase, seconds FROM timings")}
    finally:
        led.close()
    assert {(s.name, "export") for s in dask.steps} <= phases
    assert not list((tmp_path / "dask" / "products").glob(".*part*"))  # no partial file left


def test_a_failed_background_export_fails_the_run_and_keeps_the_other_products(tmp_path: Path,
                                                                                monkeypatch) -> None:
    import swathmill.tiles.run as run_mod

    real = run_mod.export_product

    def export(task):
        if task.label.startswith("centred"):
            raise OSError("disk full (simulated)")
        return real(task)

    monkeypatch.setattr(run_mod, "export_product", export)
    ex = DaskExecutor(n_workers=1, threads_per_worker=2, processes=False, retries=0)
    try:
        with pytest.raises(RuntimeError, match=r"step 'centred', product centred__output.tif: disk full"):
            es.run_pipeline(tmp_path / "run", ex)
    finally:
        ex.close()
    from swathmill.tiles.ledger import Ledger

    led = Ledger(tmp_path / "run" / "ledger.sqlite")
    try:
        assert led.product("centred", "output") is None
        assert led.product("scaled", "output") is not None  # the step before it kept its product
    finally:
        led.close()
    assert (tmp_path / "run" / "products" / "scaled__output.tif").is_file()
