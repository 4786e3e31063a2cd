"""Fits that read nothing again: steps of a fused group fit in one shared pass, and a later step's fit
rides on the pass that writes its input. Models and products are byte-identical to fitting each step on
its own, and the stores are read fewer times (counted)."""
from __future__ import annotations

import random
from collections import Counter
from pathlib import Path

import numpy as np
import pytest

import engine_script as es
from swathmill.tiles.executors import LocalExecutor, merge_tree
from swathmill.tiles.fitpass import PairTree
from swathmill.tiles.ops import band_transform_step
from swathmill.tiles.run import Run, RunOptions
from swathmill.tiles.step import Fit, Step
from swathmill.tiles.store import TileStore
from swathmill.tiles.testing import read_output

__all__: list[str] = []


@pytest.mark.parametrize("n", [1, 2, 3, 5, 8, 13, 20])
def test_the_pair_tree_merges_like_the_in_order_reduction_whatever_the_arrival_order(n):
    # the in-process reduction (merge_tree) is the reference; a non-commutative merge shows the tree's shape
    leaves = [str(k) for k in range(n)]
    merge = lambda a, b: f"({a} {b})"  # noqa: E731
    order = list(range(n))
    random.Random(n).shuffle(order)
    tree = PairTree(n, merge)
    for k in order:
        assert not tree.complete
        tree.push(k, leaves[k])
    assert tree.complete and tree.result == merge_tree(list(leaves), merge)
    with pytest.raises(ValueError, match="pushed twice"):
        tree.push(order[0], "x")


def _mean_step(name: str, ref: str) -> Step:
    return Step(name=name, kernel=es._centre_kernel, outputs=es._same_as_input, inputs={"x": ref},
                fit=Fit(es._mean_accumulate, es._mean_merge, es._mean_finalize))


def _run(run_dir: Path, steps: list[Step], fuse: bool, reads: Counter | None = None, monkeypatch=None):
    src = es.make_source(run_dir.with_name(run_dir.name + "-src.zarr"), shard=16)
    if reads is not None:
        orig = TileStore.read

        def counting(self, output, window):
            reads[Path(self.path).name] += 1
            return orig(self, output, window)

        monkeypatch.setattr(TileStore, "read", counting)
    opts = RunOptions(tile=16, export=False, fuse=fuse, config_hash=es.CONFIG_HASH)
    with Run(run_dir, opts) as run:
        res = run.execute(steps, LocalExecutor(), sources={"src": src})
    if reads is not None:
        monkeypatch.undo()
    return res


def _models(run_dir: Path) -> dict[str, bytes]:
    return {p.name: p.read_bytes() for p in sorted((run_dir / "models").glob("*.*"))}


def _same(a: Path, b: Path, names) -> None:
    assert _models(a) == _models(b)
    for n in names:
        assert read_output(a, f"{n}/output", raw=True).tobytes() == read_output(b, f"{n}/output", raw=True).tobytes(), n


def test_fits_of_a_group_share_one_read_and_give_the_same_models(tmp_path, monkeypatch):
    steps = [es.merge_order_step("order", "src/refl"), _mean_step("centred", "src/refl"),
             band_transform_step("scaled", "src/refl", scale=2.0)]
    fused_reads, plain_reads = Counter(), Counter()
    fused = _run(tmp_path / "fused", steps, True, fused_reads, monkeypatch)
    plain = _run(tmp_path / "plain", steps, False, plain_reads, monkeypatch)
    assert fused.ok and plain.ok
    _same(tmp_path / "fused", tmp_path / "plain", ["order", "centred", "scaled"])
    assert any("in a pass shared with centred" in m for m in fused.messages), fused.messages
    # 20 tiles: one shared fit pass and one fused tile pass, against two fit passes and three tile passes
    assert fused_reads["fused-src.zarr"] == 40 and plain_reads["plain-src.zarr"] == 100
    rep = {s.name: s for s in fused.steps}
    assert rep["order"].fit == rep["centred"].fit == "fitted"


def test_a_later_fit_rides_on_the_pass_that_writes_its_input(tmp_path, monkeypatch):
    # 'copy' writes band 0 (float32 with NaN where the source is invalid); both later fits read only it
    steps = [es.failing_step("copy", "src/refl"), es.merge_order_step("order", "copy/output"),
             _mean_step("centred", "copy/output")]
    fused_reads, plain_reads = Counter(), Counter()
    fused = _run(tmp_path / "fused", steps, True, fused_reads, monkeypatch)
    plain = _run(tmp_path / "plain", steps, False, plain_reads, monkeypatch)
    assert fused.ok and plain.ok
    _same(tmp_path / "fused", tmp_path / "plain", ["copy", "order", "centred"])
    said = [m for m in fused.messages if "accumulated from memory" in m]
    assert len(said) == 2 and all("20 tiles accumulated from memory, 0 read" in m for m in said), fused.messages
    # the copy store is read only by the later steps' fused tile pass (20), never for their fits
    assert fused_reads["copy.zarr"] == 20 and plain_reads["copy.zarr"] == 80


def test_a_riding_fit_reads_the_tiles_a_resumed_pass_does_not_compute(tmp_path):
    steps = [es.failing_step("copy", "src/refl"), es.merge_order_step("order", "copy/output"),
             _mean_step("centred", "copy/output")]
    es.FAIL_TILES.clear()
    es.FAIL_TILES.add((2, 3))
    try:
        first = _run(tmp_path / "run", steps, True)
    finally:
        es.FAIL_TILES.clear()
    assert first.stopped_at == "copy" and not list((tmp_path / "run" / "models").glob("order-*"))
    again = _run(tmp_path / "run", steps, True)
    assert again.ok
    assert any("1 tiles accumulated from memory, 19 read" in m for m in again.messages), again.messages
    fresh = _run(tmp_path / "fresh", steps, False)
    _same(tmp_path / "run", tmp_path / "fresh", ["copy", "order", "centred"])


def test_a_failing_rider_leaves_the_carrier_whole_and_the_step_fits_on_its_own(tmp_path):
    def bad_accumulate(block):
        raise ValueError("no samples here")

    steps = [es.failing_step("copy", "src/refl"),
             Step(name="bad", kernel=es._centre_kernel, outputs=es._same_as_input, inputs={"x": "copy/output"},
                  fit=Fit(bad_accumulate, es._mean_merge, es._mean_finalize))]
    from swathmill.tiles.tasks import TileError

    with pytest.raises(TileError, match=r"step 'bad', fit on tile.*no samples here"):
        _run(tmp_path / "run", steps, True)
    # the carrier finished every tile before the failing fit's own turn
    assert np.isfinite(read_output(tmp_path / "run", "copy/output")).any()


def _pair_accumulate(block) -> tuple:
    x, y = block.data["x"].astype(np.float64), block.data["y"].astype(np.float64)
    return np.nansum(x, axis=(1, 2)), np.nansum(y, axis=(1, 2)), int(block.valid.sum())


def _pair_merge(a: tuple, b: tuple) -> tuple:
    return a[0] + b[0], a[1] + b[1], a[2] + b[2]


def _pair_finalize(acc: tuple, params, meta) -> dict:
    return {"x": acc[0], "y": acc[1], "valid": acc[2]}


def _pair_step(name: str, x: str, y: str) -> Step:
    return Step(name=name, kernel=es._failing_kernel, outputs=es._first_band, inputs={"x": x, "y": y},
                fit=Fit(_pair_accumulate, _pair_merge, _pair_finalize))


def test_fits_reading_the_shared_input_and_several_members_ride_on_the_fused_pass(tmp_path, monkeypatch):
    # 'copy' and 'scaled' share one fused pass over src/refl; 'both' fits on the two members' outputs and
    # 'mixed' on a member's output and the shared input: both ride on the fused task, nothing is read back
    steps = [es.failing_step("copy", "src/refl"), band_transform_step("scaled", "src/refl", scale=2.0),
             _pair_step("both", "copy/output", "scaled/output"), _pair_step("mixed", "copy/output", "src/refl")]
    fused_reads, plain_reads = Counter(), Counter()
    fused = _run(tmp_path / "fused", steps, True, fused_reads, monkeypatch)
    plain = _run(tmp_path / "plain", steps, False, plain_reads, monkeypatch)
    assert fused.ok and plain.ok
    _same(tmp_path / "fused", tmp_path / "plain", ["copy", "scaled", "both", "mixed"])
    said = [m for m in fused.messages if "during the pass of" in m]
    assert len(said) == 2 and all("20 tiles accumulated from memory, 0 read" in m for m in said), fused.messages
    # src: the fused pass only (20) against copy, scaled and mixed's fit (60); the later steps' tiles read
    # copy (and scaled, src) once each in their own passes
    assert fused_reads["fused-src.zarr"] == 20 + 20 and plain_reads["plain-src.zarr"] == 20 * 4
    assert fused_reads["copy.zarr"] == 40 and plain_reads["copy.zarr"] == 80
