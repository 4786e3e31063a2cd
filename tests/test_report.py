"""The run report: one self-contained HTML file, checked by parsing and in a real headless browser."""
from __future__ import annotations

import base64
import io
import json
import re
import shutil
import subprocess
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest

from swathmill.workflows.methods.accuracy import area_estimate, class_accuracy
from swathmill.workflows.app.report import (
    AccuracyView,
    ClassMapView,
    ContinuousMapView,
    EigenvalueCurve,
    FlightLine,
    InputsSection,
    Quicklook,
    ReportSummary,
    ScatterView,
    SpectraView,
    StepTiming,
    build_report,
)

OLOFSSON_SAMPLES = np.array([[66, 0, 5, 4], [0, 55, 8, 12], [1, 0, 153, 11], [2, 1, 9, 313]])
OLOFSSON_MAPPED = np.array([200_000, 150_000, 3_200_000, 6_450_000])
# figures the summary below makes: footprints, quicklook, eigenvalues, 2 class maps, 3 continuous
# maps, 2 spectra plots, 2 scatter plots, 1 confusion matrix, timings
N_IMAGES = 14


def _summary(rng: np.random.Generator) -> ReportSummary:
    rows, cols = 120, 150
    extent = (500000.0, 500000.0 + cols * 5, 4000000.0 - rows * 5, 4000000.0)
    yy, xx = np.mgrid[0:rows, 0:cols]
    rgb = np.stack([0.1 + 0.2 * xx / cols, 0.1 + 0.2 * yy / rows, np.full((rows, cols), 0.08)])
    rgb[:, :10, :10] = np.nan
    classes = ((xx // 40) + 1).astype(np.uint8)
    classes[:5] = 0
    wl = np.linspace(400, 2500, 120)
    names = ["deforestation", "forest gain", "stable forest", "stable <non-forest> & co"]
    acc = class_accuracy(OLOFSSON_SAMPLES, names=names)
    areas = area_estimate(OLOFSSON_SAMPLES, OLOFSSON_MAPPED, pixel_area=0.09, area_unit="ha", names=names)
    obs = rng.uniform(0, 40, 50)
    return ReportSummary(
        run_name="demo-run", created="2026-12-01 10:00:00 UTC",
        inputs=InputsSection(
            lines=[FlightLine("line_01", "lines/line_01.tif", 120, 400, 90,
                              [(500050, 3999900), (500400, 3999900), (500400, 3999500), (500050, 3999500)]),
                   FlightLine("line_02", "lines/line_02.tif", 120, 400, 90,
                              [(500300, 3999950), (500700, 3999950), (500700, 3999450), (500300, 3999450)])],
            crs="EPSG:32611", grid_shape=(rows, cols), resolution=5.0, background=rgb, extent=extent),
        quicklook=Quicklook(rgb=rgb, wavelengths=(650, 550, 470), extent=extent),
        eigenvalues=[EigenvalueCurve(values=np.geomspace(400, 1.01, 30), kept=8)],
        class_maps=[ClassMapView("SAM classes", classes, ["kaolinite", "alunite", "vegetation", "water"],
                                 colors=[(230, 200, 60), (200, 80, 200), (40, 160, 40), (40, 90, 200)], extent=extent),
                    ClassMapView("SVM classes", classes[::-1], ["a", "b", "c", "d"])],
        continuous_maps=[
            ContinuousMapView("kaolinite abundance", rng.uniform(0, 1, (rows, cols)), kind="abundance", extent=extent),
            ContinuousMapView("clay", rng.uniform(5, 35, (rows, cols)), units="%", kind="quantity",
                              outside=rng.random((rows, cols)) > 0.9),
            ContinuousMapView("clay uncertainty", rng.uniform(1, 3, (rows, cols)), units="%", kind="uncertainty")],
        spectra=[SpectraView("Endmembers", wl, {"em 1": 0.3 + 0.1 * np.sin(wl / 200), "em 2": 0.2 + wl / 1e4}),
                 SpectraView("Library", wl, {"kaolinite": 0.5 - 0.1 * np.exp(-((wl - 2200) / 20) ** 2)}, kind="library")],
        scatters=[ScatterView("clay (linear, CV)", obs, obs + rng.normal(0, 2, 50), units="%"),
                  ScatterView("kaolinite abundance", rng.uniform(0, 1, 40), rng.uniform(0, 1, 40), kind="abundance")],
        accuracy=[AccuracyView("SAM classes", acc, areas)],
        timings=[StepTiming("mosaic", 12.5, "tiles", 16), StepTiming("mnf", 1.2, "fit"), StepTiming("mnf", 4.0, "tiles", 16)],
        provenance={"software": "swathmill 0.1.0", "config_hash": "abc123", "python": "3.11"},
        notes=["synthetic data for the test"],
    )


class _Refs(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.imgs: list[str] = []
        self.refs: list[tuple[str, str, str]] = []
        self.tags: set[str] = set()

    def handle_starttag(self, tag, attrs):
        self.tags.add(tag)
        for k, v in attrs:
            if k in ("src", "href", "srcset", "data", "action", "poster", "background"):
                self.refs.append((tag, k, v or ""))
        if tag == "img":
            self.imgs.append(dict(attrs).get("src", ""))


def _without_data_uris(text: str) -> str:
    return re.sub(r"data:image/png;base64,[A-Za-z0-9+/=]+", "data:", text)


@pytest.fixture(scope="module")
def full_report(tmp_path_factory) -> Path:
    """The report of the full synthetic summary, built once for the tests of this module."""
    run_dir = tmp_path_factory.mktemp("run")
    path = build_report(run_dir, _summary(np.random.default_rng(20261201)))
    assert path == run_dir / "report.html" and path.is_file()
    assert [p.name for p in run_dir.iterdir()] == ["report.html"]  # one file, nothing beside it
    return path


def test_report_self_contained(full_report):
    path = full_report
    text = path.read_text(encoding="utf-8")
    p = _Refs()
    p.feed(text)
    assert len(p.imgs) == N_IMAGES
    import matplotlib.image as mpimg

    for src in p.imgs:
        assert src.startswith("data:image/png;base64,")
        raw = base64.b64decode(src.split(",", 1)[1], validate=True)
        assert raw[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (PNG specification, ISO/IEC 15948)
        img = mpimg.imread(io.BytesIO(raw), format="png")
        assert img.shape[0] > 50 and img.shape[1] > 50
    # no remote resource: every src/href is a data URI or an in-page anchor, no scripts, no CSS url()
    assert all(v.startswith("data:") or v.startswith("#") for _, _, v in p.refs), p.refs
    assert not ({"script", "link", "iframe", "object", "embed"} & p.tags)
    rest = _without_data_uris(text)
    assert "http" not in rest.lower() and "url(" not in rest and "//" not in rest.replace("<!DOCTYPE", "")


def test_report_content(full_report):
    text = _without_data_uris(full_report.read_text(encoding="utf-8"))
    # the caution, as the issue words it: estimates, field check, local rules
    assert "estimate" in text and "in the field" in text and "local rules" in text
    # Olofsson et al. (2014) worked example, as rendered: area of deforestation 21,158 +- 6,158 ha
    assert "21,157.8 ± 6,157.6" in text and "18,000.0" in text and "0.947 ± 0.018" in text
    assert "0.880 ± 0.074" in text  # user's accuracy of deforestation, 0.88 +- 0.07 published
    # text from the run is escaped
    assert "stable &lt;non-forest&gt; &amp; co" in text and "<non-forest>" not in text
    for title in ("Inputs and flight-line footprints", "True-colour quicklook", "MNF eigenvalues", "Class maps",
                  "Abundance maps", "Quantity maps", "Endmember and library spectra",
                  "Calibration and regression checks", "Accuracy of the class maps", "Run time per step",
                  "Provenance"):
        assert f">{title}</h2>" in text, title
    # the synthetic summary has no source map, diagnostics, feature maps, feature-count curves or step
    # parameters: said so
    assert ("Not in this run: Flight line of each pixel, Unmixing diagnostics, Spectral feature maps, "
            "Number of features and model comparison, Steps and their parameters.") in text
    assert "line_02" in text and "config_hash" in text and "17.7 s" in text


def test_scatter_from_calibration_model(tmp_path, rng):
    from swathmill.workflows.methods.calibration import fit_calibration

    x = rng.uniform(0, 1, (40, 1))
    y = 3 * x[:, 0] + rng.normal(0, 0.1, 40)
    model = fit_calibration(x, y, method="linear", predictor_names=["depth"])
    view = ScatterView.from_calibration("clay", model)
    np.testing.assert_array_equal(view.predicted, model["cv_predicted"])
    text = build_report(tmp_path, ReportSummary(scatters=[view])).read_text(encoding="utf-8")
    assert "clay (linear)" in text and "predictors: depth" in text and text.count("<img ") == 1


def test_partial_run_still_reports(tmp_path):
    path = build_report(tmp_path, ReportSummary(timings=[StepTiming("mosaic", 3.0, "tiles", 4)]))
    text = path.read_text(encoding="utf-8")
    assert "Run time per step</h2>" in text and "Not in this run:" in text and "Quantity maps" in text
    assert text.count("<img ") == 1
    empty = build_report(tmp_path, ReportSummary()).read_text(encoding="utf-8")
    assert "Caution" in empty and "<img " not in empty
    with pytest.raises(FileNotFoundError, match="does not exist"):
        build_report(tmp_path / "missing", ReportSummary())


_PROBE = """<script>
window.addEventListener('load', function () {
  var imgs = Array.from(document.images);
  var ok = imgs.filter(function (i) { return i.complete && i.naturalWidth > 0 && i.naturalHeight > 0; });
  var net = performance.getEntriesByType('resource').map(function (e) { return e.name; })
    .filter(function (n) { return !/^(data|file|about):/.test(n); });
  document.body.setAttribute('data-probe', JSON.stringify({images: imgs.length, decoded: ok.length, network: net}));
});
</script>"""


def _chromium() -> str | None:
    for name in ("chromium", "chromium-browser"):
        exe = shutil.which(name) or (f"/usr/bin/{name}" if Path(f"/usr/bin/{name}").exists() else None)
        if exe:
            return exe
    return None


@pytest.mark.slow
def test_report_in_headless_chromium(tmp_path, full_report):
    exe = _chromium()
    if exe is None:
        pytest.skip("chromium is not installed (apt-get install -y chromium); the browser check needs it")
    report = full_report
    # a copy with a probe script: the report itself has none
    probe = tmp_path / "probe.html"
    probe.write_text(report.read_text(encoding="utf-8").replace("</body>", _PROBE + "</body>"), encoding="utf-8")
    cmd = [exe, "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
           "--disable-component-update", "--no-first-run", "--disable-sync",
           f"--user-data-dir={tmp_path / 'profile'}", "--virtual-time-budget=10000", "--dump-dom",
           probe.as_uri()]
    res = subprocess.run(cmd, capture_output=True, text=True, timeout=120)
    m = re.search(r"data-probe=\"([^\"]*)\"", res.stdout)
    assert m, f"chromium gave no probe result (rc {res.returncode}): {res.stderr[-2000:]}"
    found = json.loads(m.group(1).replace("&quot;", '"'))
    assert found["images"] == N_IMAGES
    assert found["decoded"] == N_IMAGES  # every embedded PNG decodes in the browser
    assert found["network"] == []  # nothing was fetched from anywhere


class _FakeView:
    """What :func:`step_parameters` reads of a run directory: ledger rows and fitted models."""

    def __init__(self, steps: dict, models: dict):
        self.steps = {n: {"info": info, "total": 4} for n, info in steps.items()}
        self.models = models

    def model(self, name):
        return self.models.get(name)

    def store(self, name):
        return None


def test_report_shows_step_parameters(tmp_path):
    from swathmill.workflows.app.report import StepParameters  # noqa: F401 - part of the summary
    from swathmill.workflows.app.report_builder import step_parameters

    rng = np.random.default_rng(3)
    gain = 1.0 + rng.normal(0, 0.03, (2, 20))
    gain[0] = 1.0
    offset = rng.normal(0, 0.002, (2, 20))
    offset[0] = 0.0
    view = _FakeView(
        steps={
            "mosaic": {"params": {"section": {"bad_bands": [[1340.0, 1460.0]], "overlap": "nearest_centre",
                                              "resampling": "nearest", "brightness_matching": True,
                                              "reference_line": 1, "sample_size": 1000},
                                  "lines": [{"name": "line_a"}, {"name": "line_b"}]}},
            "sam": {"params": {"settings": {"threshold": 0.12, "class_thresholds": {}},
                               "names": ["clay", "salt"]}, "inputs": {"x": "mosaic/reflectance"}},
            "svm": {"params": {"settings": {"C": [1.0, 10.0], "gamma": [0.01, 0.1], "folds": 3}},
                    "inputs": {"x": "mnf/components"}},
        },
        models={
            "mosaic": {"reference": 1, "gain": gain, "offset": offset, "summary": []},
            "svm": {"best": {"C": 10.0, "gamma": 0.1}, "cv_score": 0.8765, "folds": 3, "scoring": "accuracy",
                    "class_counts": {"clay": 21, "salt": 17}, "n_train": 38,
                    "validation": {"n": 12, "overall_accuracy": 0.75}},
        })
    summary = ReportSummary(title="params", parameters=[step_parameters(view, n) for n in view.steps])
    text = _without_data_uris(build_report(tmp_path, summary).read_text(encoding="utf-8"))
    assert ">Steps and their parameters</h2>" in text
    assert "1340–1460 nm" in text  # the bad-band window
    assert "at most 0.12 rad" in text  # the spectral angle threshold
    assert "chosen C = 10 and gamma = 0.1" in text and "accuracy 0.8765" in text
    assert "clay 21, salt 17" in text and "12 validation samples" in text
    # the gain table: mean gain per line, computed here with numpy
    assert f"<td>line_b</td><td>{np.mean(gain[1]):.4f}</td>" in text
    assert "<td>line_a (reference)</td><td>1.0000</td>" in text


def test_overall_accuracy_confidence_interval():
    from swathmill.workflows.app.report import overall_ci, render_html

    # Olofsson et al. (2014), Remote Sensing of Environment 148: under simple random sampling
    # V(OA) = OA (1 - OA) / (n - 1); the 95 % interval is OA +- 1.96 sqrt(V)
    p, half = overall_ci(90, 100)
    assert p == pytest.approx(0.9)
    assert half == pytest.approx(1.96 * np.sqrt(0.9 * 0.1 / 99))
    # the page says it, and says apart the samples of classes the map cannot produce
    from swathmill.workflows.methods.accuracy import class_accuracy

    m = np.array([[40, 2, 5], [3, 45, 5], [0, 0, 0]])
    ca = class_accuracy(m, labels=[1, 2, 3], names=["clay", "salt", "reed"])
    text = render_html(ReportSummary(accuracy=[AccuracyView(map_name="m", accuracy=ca, producible=["clay", "salt"])]))
    p_all, h_all = overall_ci(85, 100)
    assert f"{p_all:.3f} ± {h_all:.3f}" in text
    p_can, h_can = overall_ci(85, 90)  # the 10 reed samples are left out
    assert "10 of the 100 samples" in text and f"{p_can:.3f} ± {h_can:.3f}" in text


def test_run_time_adds_up_every_invocation(tmp_path):
    from swathmill.tiles.ledger import Ledger
    from swathmill.workflows.app.report_builder import _timings

    for inv, secs in (("20260101T000000-1", 160.0), ("20260101T010000-2", 1.5)):
        led = Ledger(tmp_path / "ledger.sqlite", invocation=inv)
        led.add_timing("mosaic", "tiles", secs)
        led.close()
    view = _FakeView({"mosaic": {}}, {})
    view.dir = tmp_path
    summary = ReportSummary()
    _timings(view, summary)
    (t,) = summary.timings
    assert t.seconds == pytest.approx(161.5) and t.invocations == 2 and t.last_seconds == pytest.approx(1.5)
    assert "20260101T000000-1, 20260101T010000-2" in summary.timing_note
