"""Benchmark at campaign scale: 12 flight lines against 3, memory, throughput, kill -9 and resume, the planner.

Run (not collected by pytest)::

    .venv/bin/python tests/benchmarks/bench_campaign.py                  # 12 lines x 200 bands, >= 20 GB
    .venv/bin/python tests/benchmarks/bench_campaign.py --quick          # 12 lines x 60 bands, 0.12 GB
    .venv/bin/python tests/benchmarks/bench_campaign.py --lines 12 --bands 200 --gb 3 --dir /scratch

What it does, in one run, in a temporary folder (``--dir`` its parent) removed at the end unless
``--keep``:

1. Data. ``--lines`` overlapping north-south flight lines (int16 reflectance x 10000, ``--bands`` bands,
   sized so that the lines together hold ``--gb`` GB), written strip by strip on the workers of a
   local Dask cluster (one line per task, one strip of rows in memory at a time): smooth invented
   abundance fields of the scenario's seven invented materials (their spectra from
   :func:`swathmill.workflows.app.scenario.material_spectra`), a per-line brightness gain and offset
   (so brightness matching has work to do), band-dependent noise, and swath edges that wobble (nodata
   outside). Each line carries the tags the ingest reads (band ``wavelength``/``fwhm``,
   ``wavelength_units``, ``scale_factor``, ``acquisition_time``). Beside them: the materials as a
   spectral library table, and two small ground references (points with ``label``, ``split``,
   ``frac_<material>``, ``clay_pct``), one inside the 3-line mosaic and one over the whole campaign.
2. Runs, each ``swathmill run CONFIG --plain`` in a child process (its own session), on a local Dask
   cluster of ``--workers`` single-threaded workers: the whole pipeline (mosaic with brightness
   matching, MNF, spectral angle, spectral feature fitting, unmixing, features, one PLS calibration;
   COG export unless ``--no-export``), first on lines 1-3 (same line size), then on all lines. The
   resident memory of every process of the child is sampled (``_common.PeakRSS``); the peak per
   worker is the largest single process other than the client's own.
3. The planner: ``swathmill plan CONFIG --json --probe`` of the all-lines configuration, before it runs.
4. Products: after the uninterrupted all-lines run, a hash of every array of every store per shard
   window (decoded values) and of every shard file's bytes, and of every COG product's pixels (every
   band, block by block) and its tags without the creation time; written to JSON; the run directory
   is then removed (only the input and one run directory are on disk at a time).
5. Kill and resume: the all-lines run again (same configuration, its run directory made afresh), killed
   with SIGKILL (the child and its cluster) once half as many tiles are recorded in its ledger as the
   uninterrupted run recorded, then run again to the end; its products are hashed and compared with
   the uninterrupted run's.

It prints progress (phase, elapsed time, load average) as it goes and, at the end, the measured
figures and their ratios, writes them all to ``--out`` (JSON), and prints the issue's asks beside
the ratios (labelled as asks, never as results). Free disk is checked first; the script refuses
with the figures when the input plus one run directory would not fit.
"""
from __future__ import annotations

import argparse
import hashlib
import json
import math
import os
import shutil
import signal
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

import _common as c  # noqa: E402
from bench_engine import _done as ledger_done  # noqa: E402  (tiles recorded done in a run's ledger)

__all__ = ["main", "write_line", "write_lines", "hash_store_window", "hash_file", "hash_cog"]

PIXEL_M = 5.0
ORIGIN = (512_000.0, 4_310_000.0)
OVERLAP = 0.25  # share of a line's width that its neighbour also covers
ASPECT = 10.0  # rows / cols of a line (long north-south strips)
STRIP = 256  # rows written at a time (the GeoTIFF block height)
T0 = time.perf_counter()


def say(phase: str, msg: str) -> None:
    print(f"[{time.perf_counter() - T0:8.1f} s | load {c.loadavg()}] {phase}: {msg}", flush=True)


# the campaign's layout --------------------------------------------------------------------------------
@dataclass(frozen=True)
class Layout:
    lines: int
    bands: int
    rows: int  # of every line
    cols: int  # of every line
    step: int  # columns between the left edges of two neighbouring lines
    seed: int

    @classmethod
    def sized(cls, lines: int, bands: int, gb: float, seed: int) -> "Layout":
        px = gb * 1e9 / (lines * bands * 2)
        cols = max(48, int(round(math.sqrt(px / ASPECT) / 16.0)) * 16)
        rows = max(64, math.ceil(px / cols))
        return cls(lines, bands, rows, cols, int(round(cols * (1 - OVERLAP))), seed)

    def line_bytes(self) -> int:
        return self.bands * self.rows * self.cols * 2

    def mosaic_cols(self, n: int) -> int:
        return self.cols + (n - 1) * self.step

    @property
    def scale(self) -> float:
        """Length scale (px) of the abundance fields: patches a fraction of a line wide."""
        return max(16.0, self.cols / 4.0)


def _bands(n: int) -> tuple[np.ndarray, np.ndarray]:
    from swathmill.workflows.app.scenario import _bands as scenario_bands

    return scenario_bands(n)


def material_table(bands: int) -> tuple[list[str], np.ndarray]:
    """The scenario's invented materials convolved to the bands: (names, (k, bands) reflectance)."""
    from swathmill.workflows.app.scenario import MATERIALS, material_spectra
    from swathmill.workflows.spectral.spectra import resample_gaussian

    wl, fwhm = _bands(bands)
    fine = np.arange(350.0, 2551.0, 1.0)
    spec = material_spectra(fine)
    names = list(MATERIALS)
    return names, np.stack([resample_gaussian(fine, spec[m], wl, fwhm) for m in names]).astype(np.float32)


def abundances(rr: np.ndarray, cc: np.ndarray, k: int, seed: int, scale: float) -> np.ndarray:
    """(k, ...) fractions at global pixel positions: a sharpened softmax of smooth fields (the same
    value for a pixel whatever line or strip asks for it, so overlapping lines agree)."""
    f = c.smooth_fields(rr, cc, k, seed, terms=3, scale=scale)
    f *= np.float32(4.0)
    f -= f.max(axis=0, keepdims=True)
    np.exp(f, out=f)
    f /= f.sum(axis=0, keepdims=True)
    return f


def _swath_centre(lay: Layout, k: int, r: np.ndarray) -> np.ndarray:
    """Column (global) of line k's centre at rows r: a slow wobble of 3 % of its width."""
    phase = 1.3 * k
    return k * lay.step + lay.cols / 2 + 0.03 * lay.cols * np.sin(2 * np.pi * r / (0.7 * lay.rows) + phase)


def write_line(task: tuple) -> dict:
    """Write one flight line strip by strip (runs on a worker); returns its facts.

    Memory: one strip of ``STRIP`` rows x the line's columns x bands in float32 (plus its int16 copy).
    """
    import rasterio
    from affine import Affine
    from rasterio.windows import Window as RWindow

    from swathmill.workflows.app.scenario import CRS, NODATA, _noise_sigma

    path, k, lay_d = task
    lay = Layout(**lay_d)
    wl, fwhm = _bands(lay.bands)
    names, spectra = material_table(lay.bands)
    rng_b = np.random.default_rng([lay.seed, 1000 + k])
    x = ((wl - 1450.0) / 1050.0).astype(np.float32)
    # brightness of line k (line 1 exact): a gain of a few per cent tilted across the spectrum and an offset
    gain = (1.0 + (0.0 if k == 0 else 0.03 * (1 if k % 2 else -1)) * (1 + rng_b.uniform(-0.3, 0.3))
            * (1 + rng_b.uniform(-0.01, 0.01) * x)).astype(np.float32)
    offset = (np.float32(0.0) if k == 0 else rng_b.uniform(-0.003, 0.003) + rng_b.uniform(-0.0015, 0.0015) * x)
    offset = np.broadcast_to(np.asarray(offset, dtype=np.float32), wl.shape)
    sigma = _noise_sigma(wl).astype(np.float32)
    c0 = k * lay.step
    transform = Affine(PIXEL_M, 0.0, ORIGIN[0] + c0 * PIXEL_M, 0.0, -PIXEL_M, ORIGIN[1])
    profile = {"driver": "GTiff", "width": lay.cols, "height": lay.rows, "count": lay.bands, "dtype": "int16",
               "crs": CRS, "transform": transform, "nodata": NODATA, "tiled": True, "blockxsize": 256,
               "blockysize": 256, "interleave": "pixel", "BIGTIFF": "YES"}
    if lay.cols < 256 or lay.rows < 256:
        profile.update(tiled=False, blockysize=16)
        profile.pop("blockxsize")
    cc = np.arange(c0, c0 + lay.cols, dtype=np.float32)[None, :]
    valid_px = 0
    with rasterio.open(path, "w", **profile) as ds:
        flown = time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(1_781_000_000 + 900 * k))
        ds.update_tags(wavelength_units="nm", scale_factor="0.0001", line=f"line{k + 1:02d}",
                       note="invented benchmark data", acquisition_time=flown)
        for b in range(lay.bands):
            ds.update_tags(b + 1, wavelength=f"{wl[b]:.3f}", fwhm=f"{fwhm[b]:.3f}")
            ds.set_band_description(b + 1, f"b{b + 1:03d} ({wl[b]:.1f} nm)")
        for r0 in range(0, lay.rows, STRIP):
            n = min(STRIP, lay.rows - r0)
            rr = np.arange(r0, r0 + n, dtype=np.float32)[:, None]
            ab = abundances(rr, cc, len(names), lay.seed, lay.scale)  # (k, n, cols)
            light = 1.0 + 0.1 * c.smooth_fields(rr, cc, 1, lay.seed + 1, scale=4 * lay.scale)[0]
            ab *= light
            cube = np.tensordot(spectra.T, ab, axes=1)  # (bands, n, cols) float32
            del ab
            rng = np.random.default_rng([lay.seed, k, r0])
            for b in range(lay.bands):  # band by band: no second strip-sized float array
                cube[b] *= gain[b]
                cube[b] += offset[b] + sigma[b] * rng.standard_normal((n, lay.cols), dtype=np.float32)
            cube *= np.float32(10000.0)
            np.rint(cube, out=cube)
            np.clip(cube, -9000, 32000, out=cube)
            out = cube.astype(np.int16)
            del cube
            centre = _swath_centre(lay, k, rr[:, 0] + 0.5)[:, None]
            inside = np.abs(cc + 0.5 - centre) <= 0.47 * lay.cols
            out[:, ~inside] = NODATA
            valid_px += int(inside.sum())
            ds.write(out, window=RWindow(0, r0, lay.cols, n))
    return {"line": k + 1, "path": str(path), "valid_pixels": valid_px, "bytes": Path(path).stat().st_size,
            "gain_mean": float(gain.mean()), "offset_mean": float(offset.mean())}


def write_lines(root: Path, lay: "Layout", workers: int) -> tuple[list[Path], list[dict]]:
    """Every flight line of ``lay`` in ``root/lines``, one line per task on a local Dask cluster of
    ``workers`` workers; their paths and facts (sorted by line)."""
    from swathmill.tiles.executors import DaskExecutor

    (root / "lines").mkdir(parents=True)
    paths = [root / "lines" / f"line{k + 1:02d}.tif" for k in range(lay.lines)]
    ex = DaskExecutor(n_workers=workers, threads_per_worker=1, retries=0)
    try:
        facts = c._map(ex, write_line, [(str(p), k, lay.__dict__) for k, p in enumerate(paths)])
    finally:
        ex.close()
    return paths, sorted(facts, key=lambda f: f["line"])


def write_library(path: Path, bands: int) -> None:
    """The invented materials as a spectral library table (format of swathmill.workflows.inputs.library)."""
    from swathmill.workflows.app.scenario import MATERIALS, material_spectra

    lwl = np.arange(400.0, 2501.0, 5.0)
    spec = material_spectra(lwl)
    names = list(MATERIALS)
    rows = ["# invented materials of the campaign benchmark, 5 nm steps", ",".join(["wavelength_nm", *names]),
            ",".join(["class", *names]), ",".join(["color", *[MATERIALS[m][0] for m in names]])]
    rows += [",".join([f"{w:g}", *[f"{spec[m][i]:.5f}" for m in names]]) for i, w in enumerate(lwl)]
    path.write_text("\n".join(rows) + "\n")


def write_reference(path: Path, lay: Layout, n_lines: int, per_class: int) -> dict:
    """Ground reference points inside the mosaic of lines 1..n_lines: ``per_class`` nearly pure points of
    each material (dominant fraction >= 0.5), split train / validation by spatial blocks, with the
    invented measured property ``clay_pct = 3 + 85 * frac_pallid_clay + N(0, 2.5)``."""
    from rasterio.warp import transform as warp_transform

    from swathmill.workflows.app.scenario import CRS, MATERIALS

    names = list(MATERIALS)
    rng = np.random.default_rng([lay.seed, 77, n_lines])
    width = lay.mosaic_cols(n_lines)
    margin = int(0.1 * lay.cols)
    n_cand = 40_000
    rr = rng.uniform(margin, lay.rows - margin, n_cand).astype(np.float32)
    cc = rng.uniform(margin, width - margin, n_cand).astype(np.float32)
    rr, cc = np.floor(rr) + 0.5, np.floor(cc) + 0.5
    ab = abundances(rr - 0.5, cc - 0.5, len(names), lay.seed, lay.scale)  # at pixel indices, as written
    dom = ab.argmax(axis=0)
    purity = ab.max(axis=0)
    block = max(lay.rows // 6, 32)
    feats, counts = [], {}
    clay = names.index("pallid_clay")
    for i, m in enumerate(names):
        idx = np.flatnonzero((dom == i) & (purity >= 0.5))
        idx = idx[np.argsort(-purity[idx], kind="stable")][:per_class]
        counts[m] = {"train": 0, "validation": 0}
        for j in idx:
            split = "validation" if (int(rr[j]) // block + int(cc[j]) // block) % 3 == 0 else "train"
            counts[m][split] += 1
            x, y = ORIGIN[0] + float(cc[j]) * PIXEL_M, ORIGIN[1] - float(rr[j]) * PIXEL_M
            lon, lat = warp_transform(CRS, "EPSG:4326", [x], [y])
            props = {"id": len(feats) + 1, "label": m, "split": split,
                     **{f"frac_{n}": round(float(ab[q, j]), 4) for q, n in enumerate(names)},
                     "clay_pct": round(float(np.clip(3.0 + 85.0 * ab[clay, j] + rng.normal(0, 2.5), 0, 100)), 2)}
            feats.append({"type": "Feature", "geometry": {"type": "Point", "coordinates": [round(lon[0], 9),
                                                                                           round(lat[0], 9)]},
                          "properties": props})
    path.write_text(json.dumps({"type": "FeatureCollection", "name": "campaign_bench_reference", "features": feats}))
    return counts


@dataclass(frozen=True)
class Files:
    """What ``demo_config`` needs to know of the data (the shape of a generated scenario's files)."""

    root: Path
    lines: tuple[Path, ...]
    library: Path
    ground_reference: Path
    seed: int

    def mosaic_section(self, relative_to: Path | None = None) -> dict:
        from swathmill.workflows.app.scenario import mosaic_section

        return mosaic_section(self.lines, self.seed, relative_to or self.root)


def run_configuration(files: Files, run_dir: Path, name: str, workers: int, tile: int, export: bool) -> dict:
    """The demo's configuration cut to the issue's pipeline: mosaic (brightness matching), MNF, spectral
    angle, feature fitting, unmixing, features and one (PLS) calibration."""
    from swathmill.workflows.app.demo import demo_config

    cfg = demo_config(files, files.root, "large", executor="dask")
    for k in ("endmembers", "band_selection", "canopy"):
        cfg.pop(k, None)
    cfg["classify"].pop("svm", None)
    cfg["classify"].pop("modal_filter", None)
    cfg["mnf"].pop("denoise_components", None)  # a float32 cube of every band: not in the pipeline
    cfg["calibrations"] = cfg["calibrations"][:1]
    cfg["execution"].update(workers=workers, threads_per_worker=1, memory_limit="auto")
    cfg["engine"].update(tile=tile, export=export)
    cfg["report"] = {"enabled": False}
    cfg["run_dir"] = str(run_dir)
    cfg["name"] = name
    return cfg


# the runs ---------------------------------------------------------------------------------------------
def _worker_peak(mem: "c.PeakRSS", client_pid: int) -> int:
    """Largest peak of one process other than the client's (a Dask worker; nannies are smaller)."""
    return max((v for pid, v in mem._per_pid.items() if pid != client_pid), default=0)


def run_child(cfg_path: Path, log: Path, label: str, kill_at: int | None = None) -> dict:
    """``swathmill run CFG --plain`` in a child process of its own session; memory sampled; progress printed.

    ``kill_at``: the child and its cluster get SIGKILL once the run's ledger records this many finished
    tiles (counted over every step, as the uninterrupted run's ``tiles_recorded``).
    """
    # the script checks the disk itself (input and one run directory); the run's own check counts no
    # compression and would refuse a campaign that fits
    cmd = [sys.executable, "-m", "swathmill", "run", str(cfg_path), "--plain", "--no-disk-check"]
    run_dir = Path(_yaml(cfg_path)["run_dir"])
    t0 = time.perf_counter()
    with open(log, "a") as fh:
        fh.write(f"\n=== {label}: {' '.join(cmd)}\n")
        fh.flush()
        proc = subprocess.Popen(cmd, stdout=fh, stderr=subprocess.STDOUT, start_new_session=True)
    killed = False
    with c.PeakRSS(pid=proc.pid, interval=0.1) as mem:
        last = 0.0
        while proc.poll() is None:
            now = time.perf_counter() - t0
            done = ledger_done(run_dir / "ledger.sqlite") if kill_at is not None else 0
            if kill_at is not None and done >= kill_at:
                os.killpg(proc.pid, signal.SIGKILL)  # the CLI and the cluster it started
                proc.wait()
                killed = True
                say(label, f"killed (SIGKILL) after {now:.1f} s with {done} tiles recorded")
                break
            if now - last >= 30.0:
                last = now
                say(label, f"running {now:.0f} s, {ledger_done(run_dir / 'ledger.sqlite')} tiles recorded, "
                           f"largest process so far {c.gb(mem.peak_max_process)}, all processes {c.gb(mem.peak)}")
            time.sleep(0.2)
    wall = time.perf_counter() - t0
    if not killed and proc.returncode != 0:
        tail = log.read_text()[-4000:]
        raise RuntimeError(f"{label}: swathmill run exited with {proc.returncode}; end of {log}:\n{tail}")
    res = {"wall_s": wall, "peak_worker_bytes": _worker_peak(mem, proc.pid),
           "peak_client_bytes": mem._per_pid.get(proc.pid, 0), "peak_all_bytes": mem.peak,
           "cpu_s": mem.cpu_seconds, "killed": killed, "tiles_recorded": ledger_done(run_dir / "ledger.sqlite")}
    if not killed:
        timings = c.step_timings(run_dir)
        res["phase_seconds"] = timings
        res["task_seconds"] = sum(p.get("fit", 0.0) + p.get("tiles", 0.0) for p in timings.values())
        res["export_seconds"] = sum(p.get("export", 0.0) for p in timings.values())
        res["disk_bytes"] = {"stores": c._du(run_dir / "stores") if (run_dir / "stores").is_dir() else 0,
                             "products": sum(f.stat().st_size for f in (run_dir / "products").glob("*.tif"))
                             if (run_dir / "products").is_dir() else 0}
    return res


def _yaml(path: Path) -> dict:
    import yaml

    return yaml.safe_load(Path(path).read_text())


def plan_probe(cfg_path: Path) -> dict:
    """``swathmill plan CFG --json --probe`` in a child process; its JSON and how long it took."""
    t0 = time.perf_counter()
    out = subprocess.run([sys.executable, "-m", "swathmill", "plan", str(cfg_path), "--json", "--probe"],
                         capture_output=True, text=True)
    if out.returncode != 0:
        raise RuntimeError(f"swathmill plan exited with {out.returncode}: {out.stderr[-3000:]}")
    d = json.loads(out.stdout[out.stdout.index("{"):])
    d["probe_wall_s"] = time.perf_counter() - t0
    return d


# hashes of the products -------------------------------------------------------------------------------
def hash_store_window(task: tuple) -> tuple[str, str]:
    """blake2b of the decoded values of one array of a store in one tile window, or of a whole 1-D array
    (runs on a worker)."""
    import zarr

    store, array, r, col, n, m = task
    a = zarr.open_array(str(Path(store) / array), mode="r")
    if r is None:  # a coordinate (1-D): whole
        v, where = np.ascontiguousarray(a[...]), ""
    else:
        v, where = np.ascontiguousarray(a[..., r:r + n, col:col + m]), f"[{r}:{r + n},{col}:{col + m}]"
    h = hashlib.blake2b(digest_size=16)
    h.update(f"{v.dtype.str}{v.shape}".encode())
    h.update(v.tobytes())
    return f"{Path(store).name}/{array}{where}", h.hexdigest()


def hash_file(path: str) -> tuple[str, str]:
    h = hashlib.blake2b(digest_size=16)
    with open(path, "rb") as fh:
        while chunk := fh.read(1 << 24):
            h.update(chunk)
    return path, h.hexdigest()


def hash_cog(path: str) -> tuple[str, dict]:
    """A COG's full-resolution pixels (every band, block by block) and overview factors as one blake2b,
    and its tags without the creation time (runs on a worker)."""
    import rasterio

    h = hashlib.blake2b(digest_size=16)
    with rasterio.open(path) as ds:
        tags = {k: v for k, v in ds.tags().items() if k.lower() != "created"}
        h.update(json.dumps([ds.count, ds.width, ds.height, ds.dtypes, ds.overviews(1)], default=str).encode())
        for _, win in ds.block_windows(1):
            h.update(np.ascontiguousarray(ds.read(window=win)).tobytes())
    return Path(path).name, {"pixels": h.hexdigest(), "tags": tags}


def product_hashes(run_dir: Path, tile: int, ex) -> dict:
    import zarr

    stores = sorted((run_dir / "stores").glob("*.zarr"))
    windows, files = [], []
    for s in stores:
        g = zarr.open_group(str(s), mode="r")
        for name, a in g.arrays():
            if a.ndim < 2:
                windows.append((str(s), name, None, None, None, None))
                continue
            rows, cols = a.shape[-2:]
            windows += [(str(s), name, r, q, min(tile, rows - r), min(tile, cols - q))
                        for r in range(0, rows, tile) for q in range(0, cols, tile)]
        files += [str(f) for f in s.rglob("*") if f.is_file()]
    cogs = [str(p) for p in sorted((run_dir / "products").glob("*.tif"))] if (run_dir / "products").is_dir() else []
    decoded = dict(c._map(ex, hash_store_window, windows))
    raw = {str(Path(p).relative_to(run_dir)): h for p, h in c._map(ex, hash_file, files)}
    cog = dict(c._map(ex, hash_cog, cogs))
    return {"store_windows": decoded, "store_files": raw, "cogs": {k: v["pixels"] for k, v in cog.items()},
            "cog_tags": {k: v["tags"] for k, v in cog.items()}}


def compare_hashes(a: dict, b: dict) -> dict:
    out = {}
    for kind in ("store_windows", "store_files", "cogs"):
        x, y = a[kind], b[kind]
        diff = sorted(k for k in set(x) | set(y) if x.get(k) != y.get(k))
        out[kind] = {"compared": len(set(x) | set(y)), "differ": len(diff), "first_differences": diff[:10]}
    keys = sorted({f"{cog}:{t}" for cog in set(a["cog_tags"]) | set(b["cog_tags"])
                   for t in set(a["cog_tags"].get(cog, {})) | set(b["cog_tags"].get(cog, {}))
                   if a["cog_tags"].get(cog, {}).get(t) != b["cog_tags"].get(cog, {}).get(t)})
    out["cog_tags"] = {"differ": len(keys), "first_differences": keys[:10]}
    return out


# main ---------------------------------------------------------------------------------------------------
def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--lines", type=int, default=12, help="flight lines of the campaign (default 12)")
    ap.add_argument("--small-lines", type=int, default=3, help="lines of the comparison run (default 3)")
    ap.add_argument("--bands", type=int, default=200)
    ap.add_argument("--gb", type=float, default=20.1, help="GB of int16 input over all lines (default 20.1)")
    ap.add_argument("--tile", type=int, default=512)
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--seed", type=int, default=13)
    ap.add_argument("--per-class", type=int, default=40, help="reference points per material")
    ap.add_argument("--no-export", dest="export", action="store_false", help="skip the COG products")
    ap.add_argument("--quick", action="store_true", help="12 lines x 60 bands, 0.12 GB, tiles of 128 px (the features need 3 bands in 2270-2390 nm)")
    ap.add_argument("--dir", type=Path, default=None, help="parent folder of the temporary work folder")
    ap.add_argument("--out", type=Path, default=Path("bench_campaign.json"), help="JSON of every figure")
    ap.add_argument("--keep", action="store_true", help="keep the work folder")
    a = ap.parse_args(argv)
    if a.quick:
        a.bands, a.gb, a.tile, a.per_class = 60, 0.12, 128, 24
    if not 2 <= a.small_lines < a.lines:
        ap.error(f"--small-lines must be at least 2 and below --lines. Got {a.small_lines} and {a.lines}")
    lay = Layout.sized(a.lines, a.bands, a.gb, a.seed)
    in_bytes = lay.lines * lay.line_bytes()
    small_bytes = a.small_lines * lay.line_bytes()
    big_px = lay.rows * lay.mosaic_cols(lay.lines)
    # one run directory, no compression counted: the mosaic store (and its COG), ~60 float32 bands of
    # outputs (and their COGs); plus the input
    run_bytes = big_px * (lay.bands * 2 + 60 * 4) * (2 if a.export else 1)
    need = in_bytes + run_bytes
    parent = a.dir or Path(tempfile.gettempdir())
    free = shutil.disk_usage(parent).free
    say("setup", f"{lay.lines} lines x {lay.bands} bands x {lay.rows} x {lay.cols} px (int16, {c.gb(lay.line_bytes())}"
                 f" each, {c.gb(in_bytes)} in all; lines {lay.step} px apart); comparison run on {a.small_lines} "
                 f"lines ({c.gb(small_bytes)}); mosaic {lay.rows} x {lay.mosaic_cols(lay.lines)} px; tiles of "
                 f"{a.tile} px; {a.workers} workers; export {'on' if a.export else 'off'}; {os.cpu_count()} CPUs")
    if need > 0.95 * free:
        print(f"refused: the input ({c.gb(in_bytes)}) plus one run directory (up to {c.gb(run_bytes)}, no "
              f"compression counted) need {c.gb(need)} but {parent} has {c.gb(free)} free (95 % of it usable "
              f"here). Free space, or choose --dir elsewhere, --gb smaller or --no-export", flush=True)
        return 2
    say("setup", f"disk: need up to {c.gb(need)}, {c.gb(free)} free in {parent}")

    from swathmill.tiles.executors import DaskExecutor

    import yaml

    work = Path(tempfile.mkdtemp(prefix="swathmill-bench-campaign-", dir=a.dir))
    log = work / "runs.log"
    res: dict = {"layout": lay.__dict__, "input_bytes": in_bytes, "small_input_bytes": small_bytes,
                 "workers": a.workers, "tile": a.tile, "export": a.export, "cpus": os.cpu_count(),
                 "load_start": c.loadavg()}
    try:
        # 1. data ------------------------------------------------------------------------------------
        root = work / "campaign"
        t0 = time.perf_counter()
        paths, facts = write_lines(root, lay, a.workers)
        res["generate_s"] = time.perf_counter() - t0
        res["line_files_bytes"] = sum(f["bytes"] for f in facts)
        say("data", f"{lay.lines} lines written in {res['generate_s']:.1f} s ({c.gb(res['line_files_bytes'])} on disk)")
        write_library(root / "library.csv", lay.bands)
        cfgs = {}
        for n in (a.small_lines, lay.lines):
            ref = root / f"reference_{n}lines.geojson"
            counts = write_reference(ref, lay, n, a.per_class)
            res[f"reference_{n}lines"] = counts
            files = Files(root, tuple(paths[:n]), root / "library.csv", ref, a.seed)
            # one configuration (and run directory) per line count: the killed and resumed run reuses the
            # all-lines one once the uninterrupted run's directory is hashed and removed, so that the
            # products' provenance (the configuration's hash) is the same
            cfg = run_configuration(files, work / f"run-{n}lines", f"bench-campaign-{n}lines", a.workers, a.tile,
                                    a.export)
            cfgs[n] = root / f"run-{n}lines.yaml"
            cfgs[n].write_text(yaml.safe_dump(cfg, sort_keys=False))
        say("data", f"library, references and configurations in {root}")

        # 2. the comparison run on the first lines ----------------------------------------------------
        say(f"run {a.small_lines} lines", "started")
        small = run_child(cfgs[a.small_lines], log, f"run {a.small_lines} lines")
        res["small_run"] = small
        say(f"run {a.small_lines} lines", f"{small['wall_s']:.1f} s, worker peak {c.gb(small['peak_worker_bytes'])}")
        shutil.rmtree(work / f"run-{a.small_lines}lines")

        # 3. the planner, then the uninterrupted run on all lines -------------------------------------
        big_cfg = cfgs[lay.lines]
        say("plan", "swathmill plan --json --probe")
        plan = plan_probe(big_cfg)
        res["plan"] = {"seconds": plan["run"]["seconds"], "disk": plan["run"]["disk"],
                       "memory_per_worker": plan["run"].get("memory_per_worker"),
                       "seconds_partial": plan["run"].get("seconds_partial"), "probe_wall_s": plan["probe_wall_s"],
                       "steps": [{k: st.get(k) for k in ("step", "seconds", "disk", "products", "ratio", "note")}
                                 for st in plan["steps"]]}
        say("plan", f"estimate: {plan['run']['seconds']} s of tile and fit tasks, {c.gb(plan['run']['disk'])} on disk "
                    f"(probe took {plan['probe_wall_s']:.1f} s)")
        say(f"run {lay.lines} lines", "started")
        big = run_child(big_cfg, log, f"run {lay.lines} lines")
        res["big_run"] = big
        say(f"run {lay.lines} lines", f"{big['wall_s']:.1f} s, worker peak {c.gb(big['peak_worker_bytes'])}")
        big_dir = work / f"run-{lay.lines}lines"
        ex = DaskExecutor(n_workers=a.workers, threads_per_worker=1, retries=0)
        try:
            t0 = time.perf_counter()
            ref_hashes = product_hashes(big_dir, a.tile, ex)
            (work / "hashes-uninterrupted.json").write_text(json.dumps(ref_hashes, indent=0))
            res["hash_s"] = time.perf_counter() - t0
            say("hash", f"{len(ref_hashes['store_windows'])} store windows, {len(ref_hashes['store_files'])} store "
                        f"files, {len(ref_hashes['cogs'])} COGs hashed in {res['hash_s']:.1f} s")
            shutil.rmtree(big_dir)

            # 4. killed at half, resumed ----------------------------------------------------------------
            cut_cfg = big_cfg
            # about half: half the tile records of the uninterrupted run (a clock would cut elsewhere
            # whenever the machine's load changes between the two runs)
            half = big["tiles_recorded"] // 2
            say("kill and resume", f"killing once {half} of {big['tiles_recorded']} tiles are recorded")
            killed = run_child(cut_cfg, log, "killed run", kill_at=half)
            killed["killed_at_fraction_of_uninterrupted_wall"] = killed["wall_s"] / big["wall_s"]
            time.sleep(1.0)  # let the killed workers' sockets close
            resumed = run_child(cut_cfg, log, "resumed run")
            res["killed_run"], res["resumed_run"] = killed, resumed
            cut_dir = big_dir
            res["resume_compare"] = compare_hashes(ref_hashes, product_hashes(cut_dir, a.tile, ex))
        finally:
            ex.close()
        shutil.rmtree(big_dir, ignore_errors=True)
        res["load_end"] = c.loadavg()
    finally:
        a.out.write_text(json.dumps(res, indent=1, default=float))
        if not a.keep:
            shutil.rmtree(work, ignore_errors=True)
    summary(res, a)
    return 0


def summary(res: dict, a: argparse.Namespace) -> None:
    s, b = res["small_run"], res["big_run"]
    n, m = a.small_lines, res["layout"]["lines"]
    tput_s = res["small_input_bytes"] / 1e9 / (s["wall_s"] / 3600)
    tput_b = res["input_bytes"] / 1e9 / (b["wall_s"] / 3600)
    mem_ratio = b["peak_worker_bytes"] / s["peak_worker_bytes"]
    cmp_ = res["resume_compare"]
    same = cmp_["store_windows"]["differ"] == 0 and cmp_["cogs"]["differ"] == 0
    plan_t = res["plan"]["seconds"]
    plan_d = res["plan"]["disk"]
    disk = b["disk_bytes"]["stores"] + b["disk_bytes"]["products"]
    k, r = res["killed_run"], res["resumed_run"]
    figures = {
        "peak_memory_per_worker_ratio": mem_ratio, "throughput_gb_per_hour": {"small": tput_s, "big": tput_b},
        "throughput_ratio": tput_b / tput_s, "resume_identical": same,
        "plan_seconds_over_measured_tasks": None if plan_t is None else plan_t / b["task_seconds"],
        "plan_seconds_over_measured_wall_without_export": None if plan_t is None
        else plan_t / (b["wall_s"] - b["export_seconds"]),
        "plan_disk_over_measured": plan_d / disk,
    }
    res["figures"] = figures
    a.out.write_text(json.dumps(res, indent=1, default=float))
    print("", flush=True)
    print(f"campaign benchmark, {m} lines ({c.gb(res['input_bytes'])}) against {n} lines "
          f"({c.gb(res['small_input_bytes'])}), {res['layout']['bands']} bands, {a.workers} workers, tiles of "
          f"{a.tile} px; load average {res['load_start']} at the start, {res.get('load_end')} at the end")
    print(f"- peak memory per worker: {m} lines {c.gb(b['peak_worker_bytes'])}, {n} lines "
          f"{c.gb(s['peak_worker_bytes'])}; ratio {mem_ratio:.3f} (issue #13 asks: within 10 %)")
    print(f"- throughput: {m} lines {tput_b:.2f} GB/h ({b['wall_s']:.1f} s), {n} lines {tput_s:.2f} GB/h "
          f"({s['wall_s']:.1f} s); ratio {tput_b / tput_s:.3f} (asks: within 15 %)")
    print(f"- kill -9 at {k['wall_s']:.1f} s ({k['tiles_recorded']} of {b['tiles_recorded']} tiles recorded, "
          f"{k['killed_at_fraction_of_uninterrupted_wall']:.2f} of the uninterrupted wall time), resumed run "
          f"{r['wall_s']:.1f} s; "
          f"products identical to the uninterrupted run: {'yes' if same else 'NO'} (decoded store windows "
          f"{cmp_['store_windows']['differ']} of {cmp_['store_windows']['compared']} differ, COGs "
          f"{cmp_['cogs']['differ']} of {cmp_['cogs']['compared']}, store files byte for byte "
          f"{cmp_['store_files']['differ']} of {cmp_['store_files']['compared']}; COG tags other than the creation time: "
          f"{cmp_['cog_tags']['differ']} differ) (asks: identical)")
    if plan_t is None:
        print("- planner time: no estimate")
    else:
        print(f"- planner time: estimate {plan_t:.1f} s, measured tile and fit phases {b['task_seconds']:.1f} s "
              f"(ratio {figures['plan_seconds_over_measured_tasks']:.3f}), run wall without export "
              f"{b['wall_s'] - b['export_seconds']:.1f} s (ratio "
              f"{figures['plan_seconds_over_measured_wall_without_export']:.3f}) (asks: within 30 %)")
    print(f"- planner disk: estimate {c.gb(plan_d)}, measured stores + products {c.gb(disk)}; ratio "
          f"{plan_d / disk:.3f} (asks: within 30 %)")
    print(f"figures in {a.out.resolve()}", flush=True)


if __name__ == "__main__":
    # run the importable module, so that workers unpickle the task functions as bench_campaign.*
    import bench_campaign

    sys.exit(bench_campaign.main())
