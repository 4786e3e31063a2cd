"""An invented demo scenario: Corrowan Playa, a fictional dry-lake basin flown in overlapping lines.

Everything here is made up for the demo and the tests: the site, its seven surface materials, the
flight lines, the ground reference and the measured property. Nothing stands for a real place,
sensor or survey.

What :func:`generate_scenario` writes under ``out_dir`` (deterministic from ``seed``):

- ``lines/corrowan_lineNN.tif``: three or more overlapping flight lines, int16 reflectance x 10000,
  nodata -9999 outside each swath, in a projected CRS (UTM zone 12 N, EPSG:32612), each with its
  own brightness gain and offset and band-dependent noise (strong in the water-vapour windows);
  wavelengths and FWHM in band tags (``wavelength``, ``fwhm``, ``wavelength_units=nm``) and band
  descriptions;
- ``lines/wavelengths.csv``: the same band centres and widths as a sidecar table;
- ``library.csv``: the seven material spectra at 5 nm (format of :mod:`swathmill.workflows.inputs.library`);
- ``ground_reference.geojson``: points and small square polygons (longitude/latitude, RFC 7946) with
  ``label``, ``split`` (train / validation, by spatial blocks), ``frac_<material>`` and ``clay_pct``;
- ``truth/abundance.tif`` (float32, one band per material), ``truth/classes.tif`` (uint8, 1..7 =
  dominant material) and ``truth/truth.npz`` (the same arrays plus the spectra and line brightness);
- ``scenario.json``: the facts (site, grid, materials, line gains and offsets, sample counts).

Material spectra are a smooth continuum times Gaussian absorption features at the positions the
trade knows for the material type each stands for (common practice; Hunt 1977, Clark 1999, from
memory): Al-OH near 2165/2205 nm, carbonate near 2340 nm, ferric iron near 900 nm, chlorophyll
near 680 nm with a red edge near 718 nm, liquid water near 970, 1200, 1450 and 1940 nm, ferrous
iron near 1000 nm. They are built on a 1 nm grid and convolved with each band's Gaussian response.
"""
from __future__ import annotations

import csv
import json
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Literal, Sequence

import numpy as np

__all__ = ["ScenarioFiles", "mosaic_section", "MATERIALS", "SIZES", "SITE_NAME", "material_spectra", "generate_scenario",
           "PADDOCK_PX", "CANOPY_RANGES", "line_geometries"]

SITE_NAME = "Corrowan Playa"
CRS = "EPSG:32612"
ORIGIN = (512_000.0, 4_310_000.0)  # upper-left corner in the CRS (metres)
NODATA = -9999
SUGGESTED_BAD_BANDS = [[1340.0, 1460.0], [1790.0, 1960.0], [2450.0, 2600.0]]

#: size -> (rows, cols, bands, lines, pixel size m, points per class, polygons per class)
SIZES: dict[str, tuple[int, int, int, int, float, int, int]] = {
    "small": (200, 200, 160, 3, 5.0, 24, 2),
    "medium": (640, 640, 180, 4, 5.0, 40, 3),
    "large": (2200, 2200, 170, 5, 5.0, 60, 4),
}

#: name -> (colour, what it stands for)
MATERIALS: dict[str, tuple[str, str]] = {
    "pallid_clay": ("#d9c89e", "pale clay crust (Al-OH doublet near 2165/2205 nm)"),
    "chalk_pan": ("#8fc7c9", "carbonate pan (carbonate near 2340 nm)"),
    "rust_crust": ("#b5532f", "iron-stained gravel (ferric iron near 900 nm)"),
    "reed_meadow": ("#3f8f3a", "green vegetation (chlorophyll near 680 nm, red edge, leaf water)"),
    "straw_scrub": ("#c9a94b", "dry vegetation (cellulose and lignin near 2100 and 2300 nm)"),
    "cinder_flow": ("#3b3b44", "dark basaltic cinder (broad ferrous iron near 1000 nm)"),
    "brine_pond": ("#2f5f8f", "shallow brine pond (water: low, falling into the near infrared)"),
}


@dataclass(frozen=True)
class ScenarioFiles:
    """Paths of a generated scenario and the facts used to build it."""

    root: Path
    lines: tuple[Path, ...]
    wavelength_table: Path
    library: Path
    ground_reference: Path
    truth_abundance: Path
    truth_classes: Path
    truth_npz: Path
    facts_json: Path
    facts: dict = field(repr=False)

    def mosaic_section(self, relative_to: Path | None = None) -> dict[str, Any]:
        """A ``mosaic`` config section for these lines (paths relative to ``relative_to``, default root)."""
        return mosaic_section(self.lines, int(self.facts["seed"]), relative_to if relative_to is not None else self.root)


def mosaic_section(lines: Sequence[Path], seed: int, base: Path) -> dict[str, Any]:
    """The ``mosaic`` config section of invented flight lines (paths relative to ``base`` where they lie
    inside it): the suggested bad-band windows, nearest-centre overlap, brightness matching."""
    return {"lines": [_rel(p, Path(base)) for p in lines], "bad_bands": [list(w) for w in SUGGESTED_BAD_BANDS],
            "overlap": "nearest_centre", "brightness_matching": True, "seed": int(seed)}


def _rel(p: Path, base: Path) -> str:
    try:
        return str(Path(p).resolve().relative_to(Path(base).resolve()))
    except ValueError:
        return str(Path(p).resolve())


# ---------------------------------------------------------------------------------------------
# spectra


def _g(wl: np.ndarray, centre: float, width: float) -> np.ndarray:
    return np.exp(-0.5 * ((wl - centre) / width) ** 2)


def _absorb(wl: np.ndarray, feats: list[tuple[float, float, float]]) -> np.ndarray:
    out = np.ones_like(wl)
    for c, w, d in feats:  # centre nm, width (sigma) nm, depth
        out *= 1.0 - d * _g(wl, c, w)
    return out


def _sig(wl: np.ndarray, centre: float, width: float) -> np.ndarray:
    return 1.0 / (1.0 + np.exp(-(wl - centre) / width))


def material_spectra(wl: np.ndarray) -> dict[str, np.ndarray]:
    """Reflectance of the seven invented materials at wavelengths ``wl`` (nm), on a fine grid."""
    wl = np.asarray(wl, dtype=np.float64)
    u = (wl - 400.0) / 2100.0
    water_leaf = [(970, 25, 0.06), (1200, 38, 0.12), (1450, 65, 0.55), (1940, 85, 0.70)]
    out: dict[str, np.ndarray] = {}
    # pale clay: bright, blue fall-off, Al-OH doublet, OH and bound water
    cont = (0.46 + 0.22 * u - 0.16 * u * u) * (0.62 + 0.38 * _sig(wl, 520, 45))
    out["pallid_clay"] = cont * _absorb(wl, [(2165, 11, 0.10), (2207, 16, 0.24), (1400, 22, 0.16),
                                             (1912, 35, 0.18), (905, 70, 0.03)])
    # carbonate pan: very bright, the carbonate feature and a weaker one
    cont = (0.58 + 0.12 * u - 0.08 * u * u) * (0.8 + 0.2 * _sig(wl, 480, 40))
    out["chalk_pan"] = cont * _absorb(wl, [(2340, 26, 0.26), (2160, 22, 0.05), (1995, 30, 0.05),
                                           (1870, 30, 0.04)])
    # iron-stained gravel: steep visible slope (charge transfer), ferric crystal field near 900 nm
    cont = 0.06 + 0.30 * _sig(wl, 585, 35) + 0.06 * u
    out["rust_crust"] = cont * _absorb(wl, [(900, 85, 0.28), (650, 25, 0.06), (2205, 20, 0.04)])
    # green vegetation: green peak, chlorophyll well, red edge, leaf water, SWIR decline
    s = _sig(wl, 718, 13)
    vis = 0.035 + 0.055 * _g(wl, 552, 38) - 0.022 * _g(wl, 678, 18)
    nir = np.where(wl < 1100, 0.50, 0.50 - 0.00019 * (wl - 1100))
    out["reed_meadow"] = (vis * (1 - s) + nir * s) * _absorb(wl, water_leaf + [(2100, 40, 0.05)])
    # dry vegetation: rising visible, weak water, cellulose/lignin features
    cont = 0.10 + 0.34 * _sig(wl, 700, 140) - 0.10 * np.clip((wl - 1300) / 1200, 0, 1)
    out["straw_scrub"] = cont * _absorb(wl, [(2100, 38, 0.14), (2300, 28, 0.08), (1730, 25, 0.05),
                                             (1200, 40, 0.04), (1450, 60, 0.12), (1940, 80, 0.18),
                                             (680, 20, 0.05)])
    # dark basaltic cinder: low and flat, broad ferrous bands
    cont = 0.065 + 0.025 * u
    out["cinder_flow"] = cont * _absorb(wl, [(1000, 150, 0.14), (2000, 260, 0.08)])
    # shallow brine pond: some blue-green, absorbed in the near infrared
    out["brine_pond"] = 0.004 + 0.055 * _g(wl, 480, 90) + 0.02 * np.exp(-(wl - 400) / 250) * (wl < 900)
    return {k: np.clip(v, 0.002, 1.0) for k, v in out.items()}


def _bands(n: int) -> tuple[np.ndarray, np.ndarray]:
    """Band centres 400-2500 nm and FWHM about 1.15 spacings, varying gently across the range."""
    wl = np.linspace(400.0, 2500.0, n)
    step = wl[1] - wl[0]
    fwhm = step * (1.15 + 0.08 * np.sin(np.linspace(0, 3 * np.pi, n)))
    return np.round(wl, 3), np.round(fwhm, 3)


# ---------------------------------------------------------------------------------------------
# ground truth


def _smooth_field(rng: np.random.Generator, shape: tuple[int, int], sigma: float) -> np.ndarray:
    """A standardised Gaussian random field of correlation length ``sigma`` pixels.

    Built on a grid coarser by ``sigma / 4`` and interpolated (cubic) to ``shape``, so that large
    scenes cost no more than small ones.
    """
    from scipy import ndimage

    f = max(1, int(sigma // 4))
    coarse = (-(-shape[0] // f) + 3, -(-shape[1] // f) + 3)
    g = ndimage.gaussian_filter(rng.standard_normal(coarse), sigma / f, mode="reflect")
    if f > 1:
        g = ndimage.zoom(g, f, order=3, mode="reflect")
    g = g[f:f + shape[0], f:f + shape[1]]
    return (g - g.mean()) / (g.std() + 1e-12)


def _abundances(rng: np.random.Generator, rows: int, cols: int) -> np.ndarray:
    """(7, rows, cols) fractions summing to one: patches, gradients, a pond, a cinder lobe, mixed edges."""
    names = list(MATERIALS)
    n = len(names)
    scale = min(rows, cols)
    yy, xx = np.mgrid[0:rows, 0:cols].astype(np.float64)
    v, h = yy / rows, xx / cols
    logits = np.stack([_smooth_field(rng, (rows, cols), scale / 11) for _ in range(n)])
    logits *= 1.2
    ix = {k: i for i, k in enumerate(names)}
    logits[ix["reed_meadow"]] += 2.4 * (0.55 - v)       # greener to the north
    logits[ix["straw_scrub"]] += 1.6 * (h - 0.4)        # drier to the east
    logits[ix["chalk_pan"]] += 1.5 * (v - 0.5)          # carbonate pan to the south
    logits[ix["pallid_clay"]] += 0.6
    # the pond: an ellipse with a soft shore
    cy, cx = rng.uniform(0.3, 0.7) * rows, rng.uniform(0.25, 0.45) * cols
    ry, rx = 0.11 * scale, 0.16 * scale
    d = np.sqrt(((yy - cy) / ry) ** 2 + ((xx - cx) / rx) ** 2)
    logits[ix["brine_pond"]] += -4.0 + 10.0 * _sig(-d, -1.0, 0.06)
    # the cinder lobe: a tongue entering from the east edge
    cyl = rng.uniform(0.55, 0.8) * rows
    wid = 0.07 * scale * (1 + 0.5 * np.sin(xx / scale * 7))
    lobe = (xx > 0.62 * cols) & (np.abs(yy - cyl - 0.1 * (xx - cols) * 0.5) < wid)
    from scipy import ndimage

    logits[ix["cinder_flow"]] += -2.5 + 8.0 * ndimage.gaussian_filter(lobe.astype(np.float64), 1.5)
    logits *= 2.2  # sharper: nearly pure interiors, mixed edges
    logits -= logits.max(axis=0, keepdims=True)
    a = np.exp(logits)
    a /= a.sum(axis=0, keepdims=True)
    a[a < 0.02] = 0.0
    a /= a.sum(axis=0, keepdims=True)
    return a.astype(np.float32)


# ---------------------------------------------------------------------------------------------
# flight lines


def _swaths(n_lines: int, rows: int, cols: int, rng: np.random.Generator) -> list[dict]:
    """Nearly north-south strips with a small heading, a wobble, and overlaps of about a quarter."""
    overlap = 0.28
    width = cols / (n_lines - (n_lines - 1) * overlap) + 0.04 * cols
    step = width * (1 - overlap)
    start = (cols - (width + (n_lines - 1) * step)) / 2 + width / 2
    out = []
    for k in range(n_lines):
        out.append({"centre": start + k * step, "half_width": width / 2,
                    "heading_deg": float(rng.uniform(-2.5, 2.5)),
                    "wobble_px": float(rng.uniform(0.5, 1.5)), "wobble_period": float(rng.uniform(0.6, 1.2) * rows),
                    "phase": float(rng.uniform(0, 2 * np.pi))})
    return out


def _swath_mask(sw: dict, rows: int, cols: int) -> np.ndarray:
    r = np.arange(rows)[:, None] + 0.5
    c = np.arange(cols)[None, :] + 0.5
    axis = (sw["centre"] + math.tan(math.radians(sw["heading_deg"])) * (r - rows / 2)
            + sw["wobble_px"] * np.sin(2 * np.pi * r / sw["wobble_period"] + sw["phase"]))
    return np.abs(c - axis) <= sw["half_width"]


def _brightness(n_lines: int, wl: np.ndarray, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """Per line and band gain and offset; line 1 (the reference) is exact."""
    gains = np.ones((n_lines, wl.size))
    offsets = np.zeros((n_lines, wl.size))
    x = (wl - 1450.0) / 1050.0
    for k in range(1, n_lines):
        g = (1 + 0.035 * (1 if k % 2 else -1) * (1 + 0.3 * (k // 2))) * (1 + rng.uniform(-0.012, 0.012) * x)
        gains[k] = g
        offsets[k] = rng.uniform(-0.004, 0.004) + rng.uniform(-0.002, 0.002) * x
    return gains, offsets


def _noise_sigma(wl: np.ndarray) -> np.ndarray:
    """Band-dependent noise: higher at the ends and much higher in the water-vapour windows."""
    base = 0.0015 + 0.0025 * ((wl - 1200.0) / 1300.0) ** 2
    vapour = 0.03 * (_g(wl, 1395, 35) + _g(wl, 1880, 45)) + 0.01 * _sig(wl, 2460, 15)
    return base + vapour


def _write_line(path: Path, true_cube_fn: Any, mask: np.ndarray, r0: int, r1: int, c0: int, c1: int,
                gain: np.ndarray, offset: np.ndarray, sigma: np.ndarray, wl: np.ndarray, fwhm: np.ndarray,
                transform: Any, rng: np.random.Generator, name: str) -> None:
    import rasterio
    from rasterio.windows import Window as RWindow

    h, w = r1 - r0, c1 - c0
    nb = wl.size
    profile = {"driver": "GTiff", "width": w, "height": h, "count": nb, "dtype": "int16", "crs": CRS,
               "transform": transform, "nodata": NODATA, "tiled": True, "blockxsize": 256, "blockysize": 256,
               "interleave": "pixel", "BIGTIFF": "IF_SAFER"}
    if w < 256 or h < 256:
        profile.update(tiled=False, blockxsize=None, blockysize=None)
        profile = {k: v for k, v in profile.items() if v is not None}
        profile["blockysize"] = 16
    with rasterio.open(path, "w", **profile) as ds:
        ds.update_tags(wavelength_units="nm", scale_factor="0.0001", site=SITE_NAME, line=name,
                       note="invented demo data")
        for b in range(nb):
            ds.update_tags(b + 1, wavelength=f"{wl[b]:.3f}", fwhm=f"{fwhm[b]:.3f}")
            ds.set_band_description(b + 1, f"b{b + 1:03d} ({wl[b]:.1f} nm)")
        block = 256
        for rr in range(r0, r1, block):
            re_ = min(rr + block, r1)
            true = true_cube_fn(rr, re_, c0, c1)  # (nb, rows, cols) float32
            obs = true * gain[:, None, None].astype(np.float32) + offset[:, None, None].astype(np.float32)
            obs += rng.standard_normal(obs.shape, dtype=np.float32) * sigma[:, None, None].astype(np.float32)
            out = np.clip(np.rint(obs * 10000.0), -9000, 32000).astype(np.int16)
            out[:, ~mask[rr:re_, c0:c1]] = NODATA
            ds.write(out, window=RWindow(0, rr - r0, w, re_ - rr))


# ---------------------------------------------------------------------------------------------
# ground reference


def _ground_reference(rng: np.random.Generator, abund: np.ndarray, classes: np.ndarray, transform: Any,
                      n_points: int, n_polys: int) -> tuple[list[dict], dict]:
    names = list(MATERIALS)
    rows, cols = classes.shape
    purity = abund.max(axis=0)
    block = max(rows // 8, 8)
    taken = np.zeros(classes.shape, dtype=bool)
    feats: list[dict] = []
    clay = names.index("pallid_clay")

    def props(rr: np.ndarray, cc: np.ndarray, label: str) -> dict:
        fr = abund[:, rr, cc].mean(axis=1)
        p: dict[str, Any] = {"label": label}
        for i, m in enumerate(names):
            p[f"frac_{m}"] = round(float(fr[i]), 4)
        # invented measured property: clay content follows the Al-OH clay fraction, plus lab noise
        p["clay_pct"] = round(float(np.clip(3.0 + 85.0 * fr[clay] + rng.normal(0, 2.5), 0, 100)), 2)
        return p

    for ci, m in enumerate(names):
        cand = np.flatnonzero(((classes == ci + 1) & (purity >= 0.5) & ~taken).ravel())
        # polygons first: 3 x 3 px squares wholly of this class
        polys = 0
        for idx in rng.permutation(cand):
            if polys >= n_polys:
                break
            r, c = divmod(int(idx), cols)
            if r < 1 or c < 1 or r > rows - 2 or c > cols - 2:
                continue
            win = (slice(r - 1, r + 2), slice(c - 1, c + 2))
            if (classes[win] != ci + 1).any() or taken[r - 2:r + 3, c - 2:c + 3].any():
                continue
            taken[win] = True
            rr, cc = np.mgrid[r - 1:r + 2, c - 1:c + 2]
            corners = [(c - 1, r - 1), (c + 2, r - 1), (c + 2, r + 2), (c - 1, r + 2), (c - 1, r - 1)]
            feats.append({"kind": "Polygon", "xy": [transform @ p for p in corners], "block": (r // block, c // block),
                          "props": props(rr.ravel(), cc.ravel(), m)})
            polys += 1
        cand = cand[~taken.ravel()[cand]]
        pick = rng.choice(cand, size=min(n_points, cand.size), replace=False) if cand.size else []
        for idx in pick:
            r, c = divmod(int(idx), cols)
            taken[r, c] = True
            feats.append({"kind": "Point", "xy": transform @ (c + 0.5, r + 0.5), "block": (r // block, c // block),
                          "props": props(np.array([r]), np.array([c]), m)})
    # a few mixed points anywhere (labelled by their dominant material)
    free = np.flatnonzero(~taken.ravel())
    for idx in rng.choice(free, size=min(len(names) * 3, free.size), replace=False):
        r, c = divmod(int(idx), cols)
        feats.append({"kind": "Point", "xy": transform @ (c + 0.5, r + 0.5), "block": (r // block, c // block),
                      "props": props(np.array([r]), np.array([c]), names[int(classes[r, c]) - 1])})
    # split by spatial blocks: per class, whole blocks go to validation until about a third is there
    for m in names:
        mine = [f for f in feats if f["props"]["label"] == m]
        blocks = sorted({f["block"] for f in mine})
        order = [blocks[i] for i in rng.permutation(len(blocks))]
        val: set = set()
        count = 0
        for b in order:  # greedy: add whole blocks while validation stays at most half
            nb_ = sum(1 for f in mine if f["block"] == b)
            if count >= len(mine) / 3:
                break
            if count + nb_ <= len(mine) / 2 and len(val) < len(blocks) - 1:
                val.add(b)
                count += nb_
        for f in mine:
            f["props"]["split"] = "validation" if f["block"] in val else "train"
    counts = {m: {s: sum(1 for f in feats if f["props"]["label"] == m and f["props"]["split"] == s)
                  for s in ("train", "validation")} for m in names}
    return feats, counts


def _geojson(feats: list[dict]) -> dict:
    from rasterio.warp import transform as warp_transform

    out = []
    for n, f in enumerate(feats):
        if f["kind"] == "Point":
            xs, ys = warp_transform(CRS, "EPSG:4326", [f["xy"][0]], [f["xy"][1]])
            geom = {"type": "Point", "coordinates": [round(xs[0], 9), round(ys[0], 9)]}
        else:
            xs, ys = warp_transform(CRS, "EPSG:4326", [p[0] for p in f["xy"]], [p[1] for p in f["xy"]])
            geom = {"type": "Polygon", "coordinates": [[[round(x, 9), round(y, 9)] for x, y in zip(xs, ys)]]}
        props = {"id": n + 1, **f["props"]}
        out.append({"type": "Feature", "geometry": geom, "properties": props})
    return {"type": "FeatureCollection", "name": "corrowan_ground_reference", "features": out}


# ---------------------------------------------------------------------------------------------
# the vegetated paddocks (canopy model demo; only with ``canopy=True``)

PADDOCK_PX = 20  #: side of a paddock in pixels: each has one set of leaf and canopy properties

#: ranges of the paddocks' properties (invented for the demo; inside the inversion's default table)
CANOPY_RANGES = {"lai": (0.5, 6.0), "cab": (20.0, 70.0), "cw": (0.006, 0.04), "cm": (0.003, 0.012)}


def line_geometries(n_lines: int) -> list[dict[str, float]]:
    """Sun and view angles (degrees) of each invented line: the sun climbs as the lines are flown."""
    return [{"sun_zenith": 40.0 - 3.0 * k, "view_zenith": 0.0, "relative_azimuth": 0.0} for k in range(n_lines)]


def _paddocks(rng: np.random.Generator, rows: int, cols: int) -> tuple[np.ndarray, dict[str, np.ndarray]]:
    """Paddock index of each pixel and each paddock's lai, cab, cw, cm (uniform over CANOPY_RANGES)."""
    pr, pc = -(-rows // PADDOCK_PX), -(-cols // PADDOCK_PX)
    ii, jj = np.mgrid[0:rows, 0:cols]
    ids = (ii // PADDOCK_PX) * pc + jj // PADDOCK_PX
    props = {k: rng.uniform(lo, hi, pr * pc) for k, (lo, hi) in CANOPY_RANGES.items()}
    return ids, props


def _paddock_spectra(props: dict[str, np.ndarray], geoms: list[dict[str, float]], wl: np.ndarray,
                     fwhm: np.ndarray) -> np.ndarray:
    """(lines, paddocks, bands) canopy reflectance of each paddock under each line's geometry, by the
    project's wrapper of the leaf and canopy model, convolved to the bands."""
    from swathmill.workflows.methods.rtm.forward import Geometry, simulate_canopy, to_bands

    out = []
    for g in geoms:
        spec = simulate_canopy(props["lai"], props["cab"], props["cw"], props["cm"], geometry=Geometry(**g))
        out.append(to_bands(spec, wl, fwhm))
    return np.stack(out).astype(np.float32)


def _canopy_cube(base: Any, reed: np.ndarray, reed_spectrum: np.ndarray, ids: np.ndarray,
                 paddock: np.ndarray) -> Any:
    """The true cube of one line: the green-vegetation share of each pixel is its paddock's canopy."""
    def cube(r0: int, r1: int, c0: int, c1: int) -> np.ndarray:
        a = reed[r0:r1, c0:c1]
        canopy = np.moveaxis(paddock[ids[r0:r1, c0:c1]], -1, 0)  # (nb, r, c)
        return (base(r0, r1, c0, c1) + a * (canopy - reed_spectrum[:, None, None])).astype(np.float32)
    return cube


def _canopy_plots(rng: np.random.Generator, feats: list[dict], abund: np.ndarray, ids: np.ndarray,
                  props: dict[str, np.ndarray], transform: Any, n_plots: int) -> int:
    """Add ground plots of measured LAI and chlorophyll (and set them on vegetated features).

    Every feature gets ``lai`` and ``cab``: measured where its green-vegetation share is at least 0.8
    (the fraction-weighted paddock value, plus measurement noise: 8 % for LAI, 3 ug cm-2 for
    chlorophyll, invented), None elsewhere. ``n_plots`` extra points on nearly pure vegetation are
    added, labelled ``reed_meadow``; whole paddocks go to validation (every third one).
    """
    reed = abund[list(MATERIALS).index("reed_meadow")]
    rows, cols = reed.shape

    def measured(rr: np.ndarray, cc: np.ndarray) -> dict[str, float | None]:
        fr = reed[rr, cc]
        if fr.mean() < 0.8:
            return {"lai": None, "cab": None}
        lai = float((fr * props["lai"][ids[rr, cc]]).mean()) * (1 + rng.normal(0, 0.08))
        cab = float(props["cab"][ids[rr, cc]].mean()) + rng.normal(0, 3.0)
        return {"lai": round(max(lai, 0.0), 3), "cab": round(max(cab, 0.0), 2)}

    inv = ~transform
    for f in feats:
        pts = [f["xy"]] if f["kind"] == "Point" else f["xy"][:4]
        cc, rr = zip(*[inv @ p for p in pts])
        if f["kind"] == "Point":
            rr_, cc_ = np.array([int(rr[0])]), np.array([int(cc[0])])
        else:
            r0, c0 = int(round(min(rr))), int(round(min(cc)))
            g = np.mgrid[r0:int(round(max(rr))), c0:int(round(max(cc)))]
            rr_, cc_ = g[0].ravel(), g[1].ravel()
        f["props"].update(measured(rr_, cc_))
    cand = np.flatnonzero((reed >= 0.95).ravel())
    added = 0
    for idx in rng.permutation(cand)[:n_plots]:
        r, c = divmod(int(idx), cols)
        p = {"label": "reed_meadow", **{f"frac_{m}": round(float(abund[i, r, c]), 4) for i, m in enumerate(MATERIALS)},
             "clay_pct": None, **measured(np.array([r]), np.array([c])),
             "split": "validation" if ids[r, c] % 3 == 0 else "train", "plot": "canopy"}
        feats.append({"kind": "Point", "xy": transform @ (c + 0.5, r + 0.5), "block": None, "props": p})
        added += 1
    return added


# ---------------------------------------------------------------------------------------------
# the scenario


def generate_scenario(out_dir: str | Path, size: Literal["small", "medium", "large"] = "small",
                      seed: int = 7, canopy: bool = False) -> ScenarioFiles:
    """Write the invented Corrowan Playa scenario under ``out_dir`` and return its paths and facts.

    Parameters
    ----------
    out_dir : folder to write into (created; existing files of a previous scenario are overwritten).
    size : "small" (200 x 200 px, 160 bands, 3 lines; the demo), "medium" (640 x 640 px, 180 bands,
        4 lines) or "large" (2200 x 2200 px, 170 bands, 5 lines; a cube of about 1.65 GB, for
        benchmarks).
    seed : everything is deterministic from it.
    canopy : also simulate vegetated paddocks for the canopy inversion (needs the ``rtm`` extra): the
        green-vegetation share of each pixel becomes the canopy reflectance of its paddock (leaf area
        index, chlorophyll, water and dry matter known per paddock, see :data:`CANOPY_RANGES`), simulated
        by the project's wrapper of the leaf and canopy model under each line's sun and view angles,
        which the lines carry as tags (``sun_zenith``, ``view_zenith``, ``relative_azimuth``); the
        ground reference gains measured ``lai`` and ``cab`` and canopy plots; ``truth/canopy.npz``
        holds the paddocks.
    """
    import rasterio
    from affine import Affine

    from swathmill.workflows.spectral.spectra import resample_gaussian

    if size not in SIZES:
        raise ValueError(f"size must be one of {sorted(SIZES)}. Got {size!r}")
    rows, cols, nb, n_lines, res, n_points, n_polys = SIZES[size]
    root = Path(out_dir)
    (root / "lines").mkdir(parents=True, exist_ok=True)
    (root / "truth").mkdir(parents=True, exist_ok=True)
    ss = np.random.SeedSequence(seed)
    r_truth, r_lines, r_bright, r_ref, *r_noise = (np.random.default_rng(s) for s in ss.spawn(4 + n_lines))
    names = list(MATERIALS)
    wl, fwhm = _bands(nb)
    fine = np.arange(350.0, 2551.0, 1.0)
    spec_fine = material_spectra(fine)
    spectra = np.stack([resample_gaussian(fine, spec_fine[m], wl, fwhm) for m in names]).astype(np.float32)
    abund = _abundances(r_truth, rows, cols)
    classes = (abund.argmax(axis=0) + 1).astype(np.uint8)
    transform = Affine(res, 0.0, ORIGIN[0], 0.0, -res, ORIGIN[1])

    def true_cube(r0: int, r1: int, c0: int, c1: int) -> np.ndarray:
        a = abund[:, r0:r1, c0:c1]
        return np.tensordot(spectra.T, a, axes=(1, 0)).astype(np.float32)  # (nb, r, c)

    geoms = line_geometries(n_lines)
    if canopy:
        r_canopy = np.random.default_rng(ss.spawn(1)[0])  # a stream of its own: the others stay unchanged
        paddock_ids, paddock_props = _paddocks(r_canopy, rows, cols)
        paddock_refl = _paddock_spectra(paddock_props, geoms, wl, fwhm)
    swaths = _swaths(n_lines, rows, cols, r_lines)
    gains, offsets = _brightness(n_lines, wl, r_bright)
    sigma = _noise_sigma(wl)
    line_paths = []
    line_facts = []
    for k, sw in enumerate(swaths):
        mask = _swath_mask(sw, rows, cols)
        rr, cc = np.nonzero(mask.any(axis=1))[0], np.nonzero(mask.any(axis=0))[0]
        r0, r1, c0, c1 = int(rr[0]), int(rr[-1]) + 1, int(cc[0]), int(cc[-1]) + 1
        name = f"corrowan_line{k + 1:02d}"
        path = root / "lines" / f"{name}.tif"
        cube_k = true_cube if not canopy else _canopy_cube(true_cube, abund[names.index("reed_meadow")],
                                                           spectra[names.index("reed_meadow")], paddock_ids,
                                                           paddock_refl[k])
        _write_line(path, cube_k, mask, r0, r1, c0, c1, gains[k], offsets[k], sigma, wl, fwhm,
                    transform @ Affine.translation(c0, r0), r_noise[k], name)
        import datetime as _dt
        import rasterio
        flown = _dt.datetime(2025, 6, 14, 17, 40, tzinfo=_dt.timezone.utc) + _dt.timedelta(minutes=12 * k)
        with rasterio.open(path, "r+") as ds:  # invented flight times: one line every 12 minutes
            ds.update_tags(acquisition_time=flown.strftime("%Y-%m-%dT%H:%M:%SZ"))
        if canopy:
            with rasterio.open(path, "r+") as ds:
                ds.update_tags(**{k2: f"{v:g}" for k2, v in geoms[k].items()})
        line_paths.append(path)
        line_facts.append({"name": name, "file": f"lines/{name}.tif", "window": [r0, c0, r1 - r0, c1 - c0],
                           "valid_pixels": int(mask.sum()), **{k2: v for k2, v in sw.items()},
                           "gain_mean": float(gains[k].mean()), "offset_mean": float(offsets[k].mean())})
    # sidecar table
    table = root / "lines" / "wavelengths.csv"
    with table.open("w", newline="") as fh:
        wr = csv.writer(fh)
        wr.writerow(["band", "wavelength_nm", "fwhm_nm"])
        for b in range(nb):
            wr.writerow([b + 1, f"{wl[b]:.3f}", f"{fwhm[b]:.3f}"])
    # spectral library at 5 nm
    lib = root / "library.csv"
    lwl = np.arange(400.0, 2501.0, 5.0)
    lspec = material_spectra(lwl)
    with lib.open("w", newline="") as fh:
        fh.write(f"# {SITE_NAME} (invented): reflectance of the site's materials, 5 nm steps\n")
        wr = csv.writer(fh)
        wr.writerow(["wavelength_nm", *names])
        wr.writerow(["class", *names])
        wr.writerow(["color", *[MATERIALS[m][0] for m in names]])
        for i, w in enumerate(lwl):
            wr.writerow([f"{w:g}", *[f"{lspec[m][i]:.5f}" for m in names]])
    # ground reference
    feats, counts = _ground_reference(r_ref, abund, classes, transform, n_points, n_polys)
    if canopy:
        n_canopy_plots = _canopy_plots(r_canopy, feats, abund, paddock_ids, paddock_props, transform, 2 * n_points)
    gref = root / "ground_reference.geojson"
    gref.write_text(json.dumps(_geojson(feats)))
    # truth
    profile = {"driver": "GTiff", "width": cols, "height": rows, "crs": CRS, "transform": transform}
    ab_path, cl_path = root / "truth" / "abundance.tif", root / "truth" / "classes.tif"
    with rasterio.open(ab_path, "w", count=len(names), dtype="float32", **profile) as ds:
        ds.write(abund)
        for i, m in enumerate(names):
            ds.set_band_description(i + 1, m)
    with rasterio.open(cl_path, "w", count=1, dtype="uint8", nodata=0, **profile) as ds:
        ds.write(classes[None])
        ds.update_tags(1, **{f"class_{i + 1}": m for i, m in enumerate(names)})
    npz = root / "truth" / "truth.npz"
    np.savez_compressed(npz, abundance=abund, classes=classes, wavelength=wl, fwhm=fwhm, spectra=spectra,
                        gains=gains, offsets=offsets, noise_sigma=sigma, materials=np.array(names))
    facts = {
        "site": SITE_NAME, "invented": True, "size": size, "seed": seed, "crs": CRS,
        "grid": {"rows": rows, "cols": cols, "transform": list(transform)[:6]},
        "bands": nb, "wavelength_range_nm": [float(wl[0]), float(wl[-1])],
        "materials": {m: {"color": MATERIALS[m][0], "stands_for": MATERIALS[m][1],
                          "pixels_dominant": int((classes == i + 1).sum())} for i, m in enumerate(names)},
        "lines": line_facts, "reference_line": 1,
        "suggested_bad_bands_nm": SUGGESTED_BAD_BANDS,
        "samples": counts, "measured_property": "clay_pct = 3 + 85 * frac_pallid_clay + N(0, 2.5), clipped to 0..100",
    }
    if canopy:
        np.savez_compressed(root / "truth" / "canopy.npz", paddock=paddock_ids, **paddock_props,
                            reflectance=paddock_refl, wavelength=wl)
        facts["canopy"] = {"paddock_px": PADDOCK_PX, "ranges": CANOPY_RANGES, "line_geometry": geoms,
                           "plots": n_canopy_plots, "model": "PROSPECT-D + 4SAIL via swathmill's wrapper",
                           "measured": "lai: fraction-weighted paddock LAI x (1 + N(0, 0.08)); "
                                       "cab: paddock Cab + N(0, 3), on features at least 80 % green vegetation"}
    facts_json = root / "scenario.json"
    facts_json.write_text(json.dumps(facts, indent=1))
    return ScenarioFiles(root, tuple(line_paths), table, lib, gref, ab_path, cl_path, npz, facts_json, facts)
