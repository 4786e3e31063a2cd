"""``swathmill demo [DIR]``: write the invented demo campaign and its configuration, then run it.

The scenario (an invented site, see :mod:`swathmill.workflows.app.scenario` and ``demo/README.md``) and its YAML
configuration are written into DIR; the run directory is ``DIR/run``. Rerun or resume it by hand with
``swathmill run DIR/demo.yaml``.
"""
from __future__ import annotations

import sys
from pathlib import Path

import yaml

from swathmill.workflows.app.scenario import SIZES, generate_scenario

__all__ = ["canopy_section", "demo_config", "write_demo", "run_demo"]

#: engine tile size per scenario size (the small demo has about a dozen tiles per step)
TILES = {"small": 64, "medium": 128, "large": 256}


def demo_config(files, root: Path, size: str, executor: str | None = None) -> dict:
    """The run configuration of the demo, every step of the pipeline switched on."""
    rel = lambda p: str(Path(p).resolve().relative_to(root.resolve()))  # noqa: E731
    ref = {"path": rel(files.ground_reference), "label": "label", "split": "split"}
    lib = rel(files.library)
    return {
        "name": f"corrowan-demo-{size}",
        "run_dir": "run",
        "execution": {"executor": executor or "dask", "workers": 2, "threads_per_worker": 1,
                      "memory_limit": "4GiB", "dashboard": "127.0.0.1:0", "retries": 2},
        "engine": {"tile": TILES[size], "zstd_level": 1, "export": True},
        "mosaic": files.mosaic_section(relative_to=root),
        "reference": ref,
        "mnf": {"method": "mnf", "components": 12, "noise_direction": "both", "denoise_components": 10},
        # band selection by class separability (floating search on the JM distance), with the curve of
        # blocked-CV accuracy against the number of selected bands
        "band_selection": {"name": "bands", "input": "mosaic/reflectance", "method": "sffs", "criterion": "jm",
                           "n_bands": 8, "reference": ref, "folds": 3, "max_per_class": 60, "curve": True},
        "endmembers": {"name": "endmembers", "method": "nfindr", "input": "mnf/components",
                       "spectra": "mosaic/reflectance", "n_endmembers": 7, "seed": 0},
        "classify": {
            "sam": [{"name": "sam", "input": "mosaic/reflectance", "references": {"library": lib},
                     "threshold": 0.12},
                    # the angle on MNF components against the training samples' class means, taking the
                    # number of components from its dimensionality curve (one standard error rule)
                    {"name": "sam_mnf", "input": "mnf/components", "references": {"samples": ref},
                     "threshold": None, "components": "auto", "folds": 3, "curve_max": 12}],
            # feature fitting only for the materials with a diagnostic feature in its range
            "sff": {"name": "sff", "input": "mosaic/reflectance",
                    "references": {"library": lib, "materials": ["pallid_clay", "chalk_pan", "straw_scrub"]},
                    "range": [2050.0, 2450.0], "max_rmse": 0.02},
            # the SVM takes the number of MNF components from its dimensionality curve (one standard
            # error rule) and records the curves of PCA components and selected bands beside it
            "svm": {"name": "svm", "input": "mnf/components", "reference": ref, "C": [1.0, 10.0, 100.0],
                    "gamma": [0.01, 0.1, 1.0], "folds": 3, "seed": 0, "components": "auto", "curve": True,
                    "curve_compare": ["mosaic/reflectance", "bands/selected"]},
            "modal_filter": {"size": 3},
        },
        "unmix": {"name": "unmix", "input": "mosaic/reflectance", "method": "fully_constrained",
                  "endmembers": {"library": lib}},
        "features": {"name": "features", "input": "mosaic/reflectance", "features": [
            {"kind": "band_depth", "name": "aloh_depth", "range": [2120.0, 2250.0]},
            {"kind": "band_minimum", "name": "aloh_position", "range": [2120.0, 2250.0]},
            {"kind": "band_depth", "name": "carbonate_depth", "range": [2270.0, 2390.0]},
            {"kind": "normalized_difference", "name": "greenness", "a": 860.0, "b": 660.0},
        ]},
        "calibrations": [
            # PLS on the short-wave infrared: robust to the dark pond pixels, where a single band depth
            # of a near-zero spectrum is noise
            {"name": "clay", "quantity": "clay", "units": "%", "method": "pls", "input": "mosaic/reflectance",
             "wavelength_ranges": [[2000.0, 2450.0]], "max_components": 8, "property": "clay_pct",
             "cv": {"folds": 5, "grouped": True, "seed": 0}},
            # the same property by SVM regression on the same bands, compared with PLS in the report
            {"name": "clay_svr", "quantity": "clay", "units": "%", "method": "svr", "input": "mosaic/reflectance",
             "wavelength_ranges": [[2000.0, 2450.0]], "C": [1.0, 10.0, 100.0], "gamma": ["scale", 0.01, 0.1],
             "property": "clay_pct", "cv": {"folds": 5, "grouped": True, "seed": 0}},
        ],
        "accuracy": {"area_unit": "ha"},
        "report": {"enabled": True, "title": "Corrowan Playa demo campaign (invented data)"},
    }


def canopy_section() -> dict:
    """The demo's canopy inversion: a small table (2,000 entries) to keep the demo quick; the sun and view
    angles come from the lines' tags; measured LAI and chlorophyll of the ground plots validate it."""
    return {"name": "canopy", "input": "mosaic/reflectance", "lut_size": 2000, "lut_chunks": 4,
            "hybrid": {"trees": 30, "training_size": 2000}, "reference_columns": {"lai": "lai", "cab": "cab"}}


def _has_canopy_model() -> bool:
    import importlib.util

    return importlib.util.find_spec("prosail") is not None


def _with_canopy(cfg: dict) -> dict:
    """The demo configuration with the canopy step (on a scenario generated with its paddocks)."""
    return {**cfg, "canopy": canopy_section()}


HEADER = """\
# swathmill demo configuration: the invented Corrowan Playa campaign (all data made up).
# Rerun or resume:  swathmill run {path}
# Every key is documented in configs/example-campaign.yaml (one comment per key) and in the README
# (section "Running your own campaign").
"""


def write_demo(root: Path, size: str = "small", seed: int = 7, executor: str | None = None) -> Path:
    """Generate the scenario into ``root`` and write ``root/demo.yaml``; return the config path."""
    if size not in SIZES:
        raise ValueError(f"demo size must be one of {sorted(SIZES)}. Got {size!r}")
    root = Path(root).resolve()
    root.mkdir(parents=True, exist_ok=True)
    files = generate_scenario(root, size=size, seed=seed, canopy=_has_canopy_model())
    cfg = demo_config(files, root, size, executor)
    if files.facts.get("canopy"):
        cfg = _with_canopy(cfg)
    path = root / "demo.yaml"
    path.write_text(HEADER.format(path=path) + yaml.safe_dump(cfg, sort_keys=False))
    return path


def run_demo(root: Path, size: str = "small", seed: int = 7, executor: str | None = None, plain: bool = False) -> int:
    from swathmill.workflows.app.pipeline import run_config

    root = Path(root)
    print(f"writing the invented demo campaign ({size}) into {root.resolve()}", flush=True)
    path = write_demo(root, size, seed, executor)
    print(f"configuration: {path}", flush=True)
    code = run_config(path, plain=plain)
    exe = Path(sys.argv[0]).resolve() if Path(sys.argv[0]).name == "swathmill" else None
    run_dir = path.parent / "run"
    print("")
    print(f"report: {run_dir / 'report.html'}")
    print("to run swathmill again, activate its environment first"
          + (f" (source {exe.parent / 'activate'})" if exe and (exe.parent / "activate").is_file() else "")
          + ", or give its full path:")
    print(f"  {exe or 'swathmill'} run {path}" + ("" if code == 0 else "   # resume what did not finish"))
    print(f"  {exe or 'swathmill'} status {run_dir}")
    print(f"  {exe or 'swathmill'} report {run_dir}")
    return code


if __name__ == "__main__":
    sys.exit(run_demo(Path(sys.argv[1]) if len(sys.argv) > 1 else Path("swathmill-demo")))
