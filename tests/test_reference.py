"""Ground reference: reading vector files and CSV, reprojecting, rasterizing, reporting what is left out."""
from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pyogrio
import pytest
import shapely
from affine import Affine
from pyproj import Transformer

from swathmill.tiles.grid import Grid
from swathmill.tiles.step import hash_static
from swathmill.workflows.inputs.reference import (
    SPLIT_CODES,
    GroundReference,
    GroundReferenceConfig,
    GroundReferenceError,
    SampleTable,
    label_codes,
    load_samples,
    read_reference,
    samples_on_grid,
)

# an invented site on a UTM grid (zone 33N), 10 m pixels, 80 x 100 pixels
GRID = Grid(80, 100, Affine(10.0, 0, 500000.0, 0, -10.0, 4650000.0), "EPSG:32633")
TO_LL = Transformer.from_crs("EPSG:32633", "EPSG:4326", always_xy=True)


def utm_box(x0: float, y0: float, x1: float, y1: float):
    return shapely.box(x0, y0, x1, y1)


def to_lonlat(geom):
    # densify first so the reprojected outline follows the UTM box closely
    g = shapely.segmentize(geom, 5.0)
    return shapely.transform(g, lambda xy: np.column_stack(TO_LL.transform(xy[:, 0], xy[:, 1])))


def write_geojson(path: Path, geoms, props: list[dict]) -> Path:
    feats = [{"type": "Feature", "properties": p, "geometry": json.loads(shapely.to_geojson(g))}
             for g, p in zip(geoms, props)]
    path.write_text(json.dumps({"type": "FeatureCollection", "features": feats}))
    return path


def centre_oracle(geom_utm, grid: Grid) -> set[tuple[int, int]]:
    """Pixels whose centre lies inside the polygon (shapely.contains_xy on every pixel centre)."""
    rr, cc = np.mgrid[:grid.rows, :grid.cols]
    xs, ys = grid.transform @ (cc + 0.5, rr + 0.5)
    inside = shapely.contains_xy(geom_utm, xs, ys)
    return set(zip(rr[inside].tolist(), cc[inside].tolist()))


def test_geojson_polygons_reprojected_match_pixel_centres(tmp_path: Path) -> None:
    polys_utm = [utm_box(500033, 4649503, 500171, 4649377),  # wholly inside
                 shapely.Polygon([(500400, 4649600), (500580, 4649650), (500520, 4649420)])]
    props = [{"label": "grass", "split": "train", "frac_grass": 0.9, "cover": 71.5},
             {"label": "soil", "split": "Validation", "frac_grass": 0.1, "cover": 12.0}]
    p = write_geojson(tmp_path / "plots.geojson", [to_lonlat(g) for g in polys_utm], props)
    ref = read_reference(p)
    assert ref.crs == "EPSG:4326" and ref.labels == ("grass", "soil") and ref.split == ("train", "validation")
    assert set(ref.properties) == {"frac_grass", "cover"}
    table, issues = samples_on_grid(ref, GRID)
    assert issues == []
    assert table.class_names == ("grass", "soil")
    for k, g in enumerate(polys_utm):
        got = {(r, c) for r, c, f in zip(table.row, table.col, table.feature) if f == k + 1}
        want = centre_oracle(g, GRID)
        # pyproj round trip of the densified outline moves edges by well under a millimetre; pixel
        # centres are decimetres away from every edge here, so the sets agree exactly
        assert got == want and len(want) > 20
    assert set(table.split.tolist()) == {SPLIT_CODES["train"], SPLIT_CODES["validation"]}
    np.testing.assert_array_equal(table.extras["cover"][table.feature == 2], 12.0)
    assert np.array_equal(table.group, table.feature)  # group_by="feature"


def test_geopackage_layer_and_all_touched(tmp_path: Path) -> None:
    geoms = np.array([shapely.to_wkb(utm_box(500100, 4649500, 500152, 4649552))], dtype=object)
    path = tmp_path / "ref.gpkg"
    pyogrio.raw.write(path, geoms, [np.array(["water"], dtype=object)], ["material"], layer="plots",
                      driver="GPKG", geometry_type="Polygon", crs="EPSG:32633")
    ref = read_reference(path, label="material", layer="plots")
    t1, _ = samples_on_grid(ref, GRID)
    t2, _ = samples_on_grid(ref, GRID, all_touched=True)
    # 52 m box from a pixel corner: 5 x 5 pixel centres inside, 6 x 6 pixels touched (common practice
    # for GDAL's rasterize rules)
    assert len(t1) == 25 and len(t2) == 36
    with pytest.raises(GroundReferenceError, match="no label column 'label'"):
        read_reference(path, layer="plots")


def test_csv_points_need_crs_and_report_outside(tmp_path: Path) -> None:
    p = tmp_path / "pts.csv"
    p.write_text("id,x,y,label,frac_water\n"
                 "1,500005,4649995,water,1.0\n"      # pixel (0, 0)
                 "2,500995,4649205,soil,0\n"         # pixel (79, 99)
                 "3,499990,4649500,soil,0\n"         # west of the grid
                 "4,500555,4649555,water,0.8\n")     # pixel (44, 55)
    with pytest.raises(GroundReferenceError, match="needs its CRS stated"):
        read_reference(p)
    ref = read_reference(p, crs="EPSG:32633")
    with pytest.warns(UserWarning, match="1 outside"):
        table, issues = samples_on_grid(ref, GRID, group_by="block", block_size=50)
    assert [(i.feature, i.reason) for i in issues] == [(3, "outside")]
    assert sorted(zip(table.row.tolist(), table.col.tolist())) == [(0, 0), (44, 55), (79, 99)]
    # blocks of 50 px: (0,0) -> block 0, (44,55) -> block 1, (79,99) -> block 3 (2 blocks across)
    by = dict(zip(zip(table.row.tolist(), table.col.tolist()), table.group.tolist()))
    assert by[(0, 0)] == 0 and by[(44, 55)] == 1 and by[(79, 99)] == 3
    np.testing.assert_array_equal(table.extras["frac_water"], [1.0, 0.0, 0.8])


def test_nothing_dropped_silently() -> None:
    grid = Grid(100, 110, GRID.transform, GRID.crs)  # top-left corner (500000, 4650000), 10 m pixels
    geoms = [utm_box(500050, 4649050, 500150, 4649150),   # rows 85-94, cols 5-14: 100 px
             utm_box(500900, 4649900, 501100, 4650100),   # rows 0-9 inside, half of it north of the grid
             utm_box(500120, 4649120, 500200, 4649200),   # rows 80-87, cols 12-19: overlaps the first
             utm_box(500302, 4649302, 500304, 4649304),   # 2 m wide: holds no pixel centre
             utm_box(600000, 4000000, 600100, 4000100)]   # far away
    labels = ("a", "b", "c", "a", "b")
    ref = GroundReference(np.array(geoms, dtype=object), labels, "EPSG:32633", ("",) * 5)
    valid = np.ones(grid.shape, bool)
    valid[85:87, 5:15] = False  # two rows of the first box on nodata
    with pytest.warns(UserWarning, match="ground reference"):
        table, issues = samples_on_grid(ref, grid, valid=valid)
    reasons = {(i.feature, i.reason): i.pixels for i in issues}
    first, second, third = (centre_oracle(g, grid) for g in geoms[:3])
    assert (len(first), len(second), len(third)) == (100, 200, 64)
    overlap = first & third
    assert len(overlap) == 9  # rows 85-87 x cols 12-14, claimed by 'a' and 'c'
    assert reasons[(1, "conflict")] == 9 and reasons[(3, "conflict")] == 9
    on_nodata = {(r, c) for r, c in first - overlap if not valid[r, c]}
    assert reasons[(1, "nodata")] == len(on_nodata) == 14
    assert reasons[(2, "partly_outside")] == 200
    assert reasons[(4, "no_pixel")] == 0 and (5, "outside") in reasons
    # every pixel of every feature is either in the table or reported
    assert int(np.sum(table.feature == 1)) == len(first) - 9 - 14
    assert int(np.sum(table.feature == 2)) == 200
    assert int(np.sum(table.feature == 3)) == len(third) - 9
    got = set(zip(table.row.tolist(), table.col.tolist()))
    assert got == (first | second | third) - overlap - on_nodata


def test_label_errors(tmp_path: Path) -> None:
    with pytest.raises(GroundReferenceError, match=r"label\(s\) \['reed'\] are not in the class list"):
        label_codes(["water", "reed"], ["water", "soil"], "plots.gpkg")
    codes, names = label_codes(["soil", "water", "soil"], None)
    assert names == ("soil", "water") and codes.tolist() == [1, 2, 1]
    p = write_geojson(tmp_path / "e.geojson", [to_lonlat(utm_box(500000, 4649900, 500100, 4650000))] * 2,
                      [{"label": "x", "split": "train"}, {"label": " ", "split": "train"}])
    with pytest.raises(GroundReferenceError, match=r"e.geojson: feature\(s\) \[2\] have an empty 'label' label"):
        read_reference(p)
    p = write_geojson(tmp_path / "s.geojson", [to_lonlat(utm_box(500000, 4649900, 500100, 4650000))],
                      [{"label": "x", "split": "calibration"}])
    with pytest.raises(GroundReferenceError, match="feature 1: split must be 'train' or 'validation'"):
        read_reference(p)
    with pytest.raises(GroundReferenceError, match="does not exist"):
        read_reference(tmp_path / "missing.gpkg")


def test_sample_table_static_round_trip_and_config(tmp_path: Path) -> None:
    p = tmp_path / "pts.csv"
    p.write_text("x,y,class,split,frac_a\n500005,4649995,a,train,0.5\n500555,4649555,b,validation,1\n")
    cfg = GroundReferenceConfig(path="pts.csv", label="class", crs="EPSG:32633", classes=["b", "a"])
    table, issues = load_samples(cfg, GRID, base_dir=tmp_path)
    assert issues == [] and table.class_names == ("b", "a") and table.label.tolist() == [2, 1]
    static = table.to_static()
    back = SampleTable.from_static(static)
    for k in ("row", "col", "label", "group", "feature", "split"):
        np.testing.assert_array_equal(getattr(back, k), getattr(table, k))
    assert back.class_names == table.class_names and list(back.extras) == ["frac_a"]
    assert hash_static(static) == hash_static(back.to_static())
    assert table.counts() == {"b": 1, "a": 1}
    with pytest.raises(Exception, match="unknown|extra"):
        GroundReferenceConfig(path="x", lable="typo")
