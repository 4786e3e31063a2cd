"""The engine end to end in one process: tiled equals untiled against scipy.ndimage on the whole array,
bad plans refused with nothing recorded, products that validate and carry their provenance."""
from __future__ import annotations

import datetime as dt
import json
from pathlib import Path

import numpy as np
import pytest
import rasterio
from scipy import ndimage

import engine_script as es
from swathmill.tiles.executors import LocalExecutor
from swathmill.tiles.ledger import Ledger
from swathmill.tiles.ops import band_transform_step, mean_filter_step, modal_filter_step
from swathmill.tiles.run import PlanError, Run, RunOptions, run_status
from swathmill.tiles.step import OutputSpec, canonical_json, params_dump
from swathmill.tiles.store import StoreError, open_store
from swathmill.tiles.testing import default_grid, read_output, run_on_arrays, write_source_store

ROWS, COLS = 37, 45  # not a multiple of any tile size used: edge tiles are partial


def _mean_reference(x: np.ndarray, valid: np.ndarray, size: int) -> np.ndarray:
    """k x k mean over valid pixels inside the grid, on the whole array at once (scipy.ndimage)."""
    w = valid.astype(np.float64)
    num = np.stack([ndimage.uniform_filter(np.where(valid, b, 0.0), size, mode="constant") for b in x])
    den = ndimage.uniform_filter(w, size, mode="constant")
    out = num / np.where(den > 0, den, np.nan)
    out[:, ~valid] = np.nan
    return out


def _majority(values: np.ndarray, n_classes: int) -> float:
    """Brute-force majority of one k x k window (its centre in the middle); 0 never votes.

    Ties go to the centre pixel's class when it is among the tied, else to the smallest class.
    """
    centre = int(values[values.size // 2])
    if centre == 0:
        return 0.0
    counts = np.bincount(values.astype(np.int64), minlength=n_classes + 1)
    counts[0] = -1
    best = counts.max()
    return float(centre if counts[centre] == best else int(np.argmax(counts)))


@pytest.mark.parametrize(("tile", "size"), [(8, 5), (8, 7), (16, 7), (16, 5)])
def test_mean_filter_tiled_equals_whole_array_scipy(tmp_path: Path, rng: np.random.Generator,
                                                    tile: int, size: int) -> None:
    x = rng.normal(0.3, 0.1, (3, ROWS, COLS)).astype(np.float32)
    valid = np.ones((ROWS, COLS), bool)
    valid[10:15, 7:20] = False  # a nodata hole across tile borders
    valid[:, -1] = False
    out, result = run_on_arrays([mean_filter_step("smooth", "src/refl", size=size)], {"refl": x}, tmp_path,
                                tile=tile, valid=valid)
    assert result.ok
    got = out["smooth/output"]
    # scipy.ndimage.uniform_filter on the whole array: the tiles, only a few times the halo, leave no seam
    want = _mean_reference(x.astype(np.float64), valid, size)
    assert np.array_equal(np.isnan(got), np.isnan(want))
    np.testing.assert_allclose(got, want, rtol=1e-6, atol=1e-7, equal_nan=True)
    # one interior pixel by hand: the plain mean of its window (common practice)
    r, c, h = 25, 30, size // 2
    assert valid[r - h:r + h + 1, c - h:c + h + 1].all()
    np.testing.assert_allclose(got[1, r, c], x[1, r - h:r + h + 1, c - h:c + h + 1].astype(np.float64).mean(),
                               rtol=1e-6)


@pytest.mark.parametrize(("tile", "size"), [(8, 5), (8, 7), (16, 7)])
def test_modal_filter_tiled_equals_whole_array_brute_force(tmp_path: Path, rng: np.random.Generator,
                                                           tile: int, size: int) -> None:
    n = 3
    classes = rng.integers(0, n + 1, (ROWS, COLS)).astype(np.uint8)  # 0 = unclassified; many ties
    classes[20:30, 5:25] = 2  # a block where the majority is clear
    spec = OutputSpec(bands=("class",), dtype="uint8", nodata=0, kind="categorical",
                      class_names=("a", "b", "c"))
    out, result = run_on_arrays([modal_filter_step("clean", "src/cls", size=size, n_classes=n)],
                                {"cls": (classes[None], spec)}, tmp_path, tile=tile, raw=True)
    assert result.ok
    got = out["clean/output"][0]
    # brute force on the whole array with scipy.ndimage.generic_filter (pixels outside the grid are 0
    # and do not vote), same tie rule
    want = ndimage.generic_filter(classes, _majority, size=size, mode="constant", cval=0,
                                  extra_arguments=(n,)).astype(np.uint8)
    assert np.array_equal(got, want), f"{int((got != want).sum())} pixels differ"
    assert (got[22:28, 8:22] == 2).all()
    assert ((got != classes) & (classes != 0)).any()  # the filter did change something


def test_band_transform_is_per_pixel_and_decodes_scaled_integers(tmp_path: Path) -> None:
    cube, valid = es.make_cube(24, 40, 3, seed=3)
    spec = OutputSpec(bands=("b001", "b002", "b003"), dtype="int16", nodata=-9999, attrs={"scale_factor": 1e-4})
    step = band_transform_step("sel", "src/refl", scale=2.0, offset=0.5, bands=["b003", "b001"], band_index=[2, 0])
    out, result = run_on_arrays([step], {"refl": (cube, spec)}, tmp_path, tile=8, valid=valid)
    assert result.ok
    # CF decoding: physical = stored * scale_factor; nodata -> NaN (CF conventions, common practice)
    phys = np.where(valid, cube.astype(np.float64) * 1e-4, np.nan)
    want = phys[[2, 0]] * 2.0 + 0.5
    np.testing.assert_allclose(out["sel/output"], want, rtol=1e-6, equal_nan=True)
    store = open_store(tmp_path / "run" / "stores" / "sel.zarr")
    assert store.specs["output"].bands == ("b003", "b001")


def test_recreated_store_is_not_written_with_its_old_layout(tmp_path: Path) -> None:
    """A step invalidated in the same process (new bands and dtype) must not reuse a cached store."""
    g = default_grid(32, 32)
    x = np.arange(3 * 32 * 32, dtype=np.float32).reshape(3, 32, 32) / 100
    src = write_source_store(tmp_path / "src.zarr", {"refl": (x, OutputSpec(("a", "b", "c"), "float32", np.nan))},
                             g, shard=16)
    for bands, idx, dtype in [(["a", "b", "c"], [0, 1, 2], "float32"), (["b"], [1], "int16")]:
        with Run(tmp_path / "run", RunOptions(tile=16, export=False)) as run:
            r = run.execute([band_transform_step("bt", "src/refl", scale=2.0, bands=bands, band_index=idx,
                                                 dtype=dtype)], LocalExecutor(), sources={"src": src})
        assert r.ok
        got = read_output(tmp_path / "run", "bt/output", raw=True)
        assert got.dtype == np.dtype(dtype)
        assert np.array_equal(got, np.rint(x[idx] * 2).astype(dtype) if dtype == "int16" else x[idx] * 2)
    assert r.steps[0].invalidated is not None


# bad input ----------------------------------------------------------------------------------------
@pytest.fixture
def source(tmp_path: Path) -> Path:
    return es.make_source(tmp_path / "src.zarr", rows=48, cols=48, bands=2, shard=16)


def _nothing_finished(run_dir: Path) -> None:
    led = Ledger(run_dir / "ledger.sqlite")
    try:
        rows = led.db.execute("SELECT name, i, j FROM tiles WHERE status='done'").fetchall()
        assert rows == [], f"tiles recorded as finished: {rows}"
        assert led.history() == []
    finally:
        led.close()
    assert run_status(run_dir) == []


@pytest.mark.parametrize(("opts", "steps", "error", "match"), [
    (RunOptions(tile=8), [mean_filter_step("wide", "src/refl", size=19)], PlanError,
     r"step 'wide': halo of 9 px is larger than the tile size of 8 px"),
    (RunOptions(tile=48, chunk=32), [mean_filter_step("smooth", "src/refl", size=3)], StoreError,
     r"tile size 48 px is not a multiple of the chunk size 32 px"),
    (RunOptions(tile=48, shard=32), [mean_filter_step("smooth", "src/refl", size=3)], PlanError,
     r"step 'smooth': tiles of 48 px would share shards of 32 px"),
    (RunOptions(tile=16), [mean_filter_step("smooth", "nosuch/output", size=3)], PlanError,
     r"step 'smooth': input 'input' refers to 'nosuch/output', but no earlier step or source is called 'nosuch'"),
    (RunOptions(tile=16), [mean_filter_step("smooth", "src/bands", size=3)], PlanError,
     r"refers to 'src/bands', but step 'src' has outputs \['refl'\]"),
])
def test_bad_plan_is_refused_and_nothing_is_recorded(tmp_path: Path, source: Path, opts, steps, error,
                                                     match: str) -> None:
    run_dir = tmp_path / "run"
    with pytest.raises(error, match=match):
        with Run(run_dir, opts) as run:
            run.execute(steps, LocalExecutor(), sources={"src": source})
    _nothing_finished(run_dir)
    assert not (run_dir / "run.lock").exists()  # the lock is released on the error


def test_bad_step_after_a_good_one_records_only_the_good_one(tmp_path: Path, source: Path) -> None:
    run_dir = tmp_path / "run"
    steps = [mean_filter_step("ok", "src/refl", size=3), mean_filter_step("wide", "ok/output", size=41)]
    with pytest.raises(PlanError, match=r"step 'wide': halo of 20 px is larger than the tile size of 16 px"):
        with Run(run_dir, RunOptions(tile=16, export=False)) as run:
            run.execute(steps, LocalExecutor(), sources={"src": source})
    status = {s["step"]: s for s in run_status(run_dir)}
    assert set(status) == {"ok"} and status["ok"]["done"] == status["ok"]["total"] == 9


# products -----------------------------------------------------------------------------------------
def test_every_product_is_a_valid_cog_with_a_valid_stac_item_and_provenance(tmp_path: Path) -> None:
    from rio_cogeo.cogeo import cog_validate

    import pystac
    from swathmill.tiles.export import validate_item_offline

    result = es.run_pipeline(tmp_path / "run", LocalExecutor(), tile=32)
    assert result.ok
    reports = {s.name: s for s in result.steps}
    steps = {s.name: s for s in es.build_steps()}
    products = sorted((tmp_path / "run" / "products").glob("*.tif"))
    assert [p.name for p in products] == sorted(f"{n}__output.tif" for n in reports)
    for path in products:
        name = path.name.split("__")[0]
        # rio-cogeo's validator (the GDAL COG checks): no errors, no warnings
        valid, errors, warnings = cog_validate(path, quiet=True)
        assert valid and not errors and not warnings, (path.name, errors, warnings)
        # the STAC item validates offline (pystac's bundled core schema + the extension checks)
        item = pystac.Item.from_file(str(path) + ".json")
        validate_item_offline(item)
        assert item.assets["data"].href.endswith(path.name)
        with rasterio.open(path) as ds:
            tags = ds.tags()
            data = ds.read()
            store = open_store(tmp_path / "run" / "stores" / f"{name}.zarr")
            assert np.array_equal(data, store.read("output", store.grid.full), equal_nan=True)
            assert ds.crs.to_epsg() == 32633 and ds.transform == store.grid.transform
            if store.specs["output"].kind == "categorical":
                cmap = ds.colormap(1)
                assert all(k in cmap for k in range(1, len(es.CLASS_NAMES) + 1))
                assert all(n in tags["class_names"] for n in es.CLASS_NAMES)
        for k in ("software_version", "config_hash", "step_key", "parameters", "input_fingerprints", "created"):
            assert tags.get(k), f"{path.name}: provenance tag {k!r} missing"
        assert tags["config_hash"] == es.CONFIG_HASH
        assert tags["step_key"] == reports[name].key
        assert json.loads(tags["parameters"]) == json.loads(canonical_json(params_dump(steps[name].params)))
        fingerprints = json.loads(tags["input_fingerprints"])
        for alias, ref in steps[name].inputs.items():
            upstream = ref.split("/")[0]
            if upstream in reports:
                assert fingerprints[alias] == reports[upstream].key
        created = dt.datetime.fromisoformat(tags["created"].replace("Z", "+00:00"))
        assert abs((dt.datetime.now(dt.timezone.utc) - created).total_seconds()) < 600
        assert item.properties["swathmill:step_key"] == reports[name].key


def _passthrough(block, model) -> dict:
    return {"output": block.data["x"]}


def _same_spec(meta, model, params) -> dict:
    return {"output": meta["x"].spec}


def test_raw_step_writes_its_stored_values_unchanged(tmp_path: Path) -> None:
    """decode=False: the kernel sees stored int16 values and returns stored values; no re-scaling."""
    from swathmill.tiles.step import Step

    cube, valid = es.make_cube(32, 48, 3, seed=5)
    spec = OutputSpec(bands=("b001", "b002", "b003"), dtype="int16", nodata=-9999, attrs={"scale_factor": 1e-4})
    step = Step(name="copy", kernel=_passthrough, outputs=_same_spec, inputs={"x": "src/refl"}, decode=False)
    out, result = run_on_arrays([step], {"refl": (cube, spec)}, tmp_path, tile=16, valid=valid, raw=True)
    assert result.ok
    assert out["copy/output"].dtype == np.int16 and np.array_equal(out["copy/output"], cube)


def test_band_runs_copy_equals_fancy_indexing() -> None:
    from swathmill.tiles.store import copy_bands, index_runs

    rng = np.random.default_rng(5)
    flat = rng.integers(-50, 50, (30, 200)).astype(np.int16)
    flat[7, 13] = -9999  # nodata in a kept band: column 13 is flagged
    flat[20, 14] = -9999  # in a dropped band: column 14 is not
    index = np.array([0, 1, 2, 5, 6, 7, 8, 19, 21, 22, 29])
    runs = index_runs(index)
    assert [(r.start, r.stop) for r in runs] == [(0, 3), (5, 9), (19, 20), (21, 23), (29, 30)]
    out = np.empty((index.size, 100), np.float32)
    hit = copy_bands(flat, runs, slice(0, 100), out, -9999)
    # oracle: numpy fancy indexing and a direct comparison
    np.testing.assert_array_equal(out, flat[index, :100].astype(np.float32))
    np.testing.assert_array_equal(hit, (flat[index, :100] == -9999).any(axis=0))
    assert hit[13] and not hit[14]
    assert copy_bands(flat, runs, slice(0, 100), out, float("nan")) is None
    assert index_runs(np.array([], dtype=int)) == []
