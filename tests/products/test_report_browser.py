"""The HTML report opened in a real browser (headless Chromium).

How "every image decoded" is established, robustly and without putting a script in the
report itself:

1. The report as written (its Content-Security-Policy forbids every fetch and every
   script) is rendered to a screenshot, and its DOM is dumped: the dump must show the
   same images, and nothing in it may point outside the file.
2. The test writes a *probe copy* of the report: the same bytes with one inline script
   appended and ``script-src 'unsafe-inline'`` added to the policy (``img-src data:`` is
   kept, so images load under the report's own rule).  After the load event the script
   records, for every ``<img>``, ``complete`` and ``naturalWidth × naturalHeight`` —
   Chromium's own verdict that it decoded the image — and ``document.body.innerText``,
   the text as rendered.  ``--dump-dom`` returns that record.
3. Each embedded PNG is also decoded with PIL; its pixel size must equal the size
   Chromium reports.

Skipped only when Chromium is not installed *and* this is not CI (``CI=true`` makes a
missing browser a failure).
"""

from __future__ import annotations

import base64
import html
import io
import json
import os
import re
import shutil
import subprocess
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

from driftwise import __version__
from driftwise.files import CAUTION
from driftwise.products import plots, report

FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--no-first-run", "--disable-background-networking",
         "--disable-component-update", "--disable-sync", "--disable-quic", "--hide-scrollbars",
         "--disable-extensions", "--mute-audio"]


def _chromium() -> str:
    for name in ("chromium", "chromium-browser", "google-chrome"):
        path = shutil.which(name)
        if path:
            return path
    if os.environ.get("CI", "").lower() == "true":
        pytest.fail("Chromium is not installed, and in CI the browser test must run (apt-get install chromium)")
    pytest.skip("Chromium is not installed (apt-get install chromium); outside CI this test is skipped")


def _run(browser: str, tmp_path: Path, *args: str) -> subprocess.CompletedProcess:
    profile = tmp_path / f"profile-{len(list(tmp_path.glob('profile-*')))}"
    cmd = [browser, *FLAGS, f"--user-data-dir={profile}", *args]
    done = subprocess.run(cmd, capture_output=True, timeout=120, text=True, env={**os.environ, "HOME": str(tmp_path)})
    assert done.returncode == 0, f"chromium failed ({done.returncode}): {done.stderr[-2000:]}"
    return done


def _summary(tmp_path: Path) -> dict:
    """A summary like the demo's, with real figures from plots.py on small arrays."""
    x, y = np.linspace(0, 20e3, 21), np.linspace(0, 12e3, 13)
    gx, gy = np.meshgrid(x, y)
    g = np.exp(-((gx - 10e3) ** 2 + (gy - 6e3) ** 2) / (2 * 4e3**2))
    mean = np.stack([-0.3 * (gy - 6e3) / 4e3 * g, 0.3 * (gx - 10e3) / 4e3 * g], -1)
    plots.save_figure(plots.plot_mean_field(x, y, mean, 0.02 + 0.1 * (1 - g)), tmp_path / "field.png")
    h = [21600.0, 43200.0, 86400.0]
    plots.save_figure(plots.plot_skill_coverage(h, skill=[0.712, 0.634, 0.551], separation_m=[812, 1490, 2980],
                                                coverage_50=[0.47, 0.51, 0.52], coverage_95=[0.93, 0.94, 0.96]),
                      tmp_path / "skill.png")
    return {
        "title": "driftwise demo — the invented bay",
        "created_utc": "2025-03-01T12:00:00Z",
        "command": "driftwise demo --out /tmp/demo-out",
        "job": {"description": "Whole job on invented data.", "wall_time_s": 58.2,
                "steps": [{"name": "fit", "status": "done", "seconds": 21.7, "detail": "helmholtz"}]},
        "data": {"fit": {"n_tracks": 36, "n_fixes": 3456}, "qc": [{"action": "dropped fixes faster than 5 m/s",
                                                                   "count": 4, "detail": "spikes"}]},
        "fit": {"kernel": "helmholtz", "elbo": 4321.9, "diffusivity_m2_s": 11.83, "decorrelation_time_s": 5400.0,
                "hyperparameters": {"divergence_free": {"velocity_scale_m_s": 0.2468, "length_scale_m": 4150.0}}},
        "check": {"verdict": {"divergence_free": False, "curl_free": False,
                              "reasons": ["the divergent part holds 0.183 of the velocity variance"]}},
        "spread": [{"name": "Fuel spill at the harbour mouth", "method": "cubature",
                    "columns": ["time (h)", "mean x (m)", "P(inside shellfish bed) (–)"],
                    "rows": [[0.0, 1200.0, 0.0], [6.0, 3456.7, 0.271], [12.0, 5100.2, 3.2e-11]],
                    "formats": ["hours", "metres", "probability"]}],
        "skill": {"horizons_s": h, "skill": [0.712, 0.634, 0.551], "coverage_95": [0.93, 0.94, 0.96]},
        "figures": [{"path": "field.png", "caption": "Mean velocity and its uncertainty", "section": "fit"},
                    {"path": "skill.png", "caption": "Skill and calibration", "section": "skill"}],
        "warnings": ["a naive ISO time was taken as UTC"],
    }


class _Images(HTMLParser):
    def __init__(self):
        super().__init__()
        self.srcs: list[str] = []
        self.urls: list[str] = []
        self.probe: list[str] = []
        self._in_probe = False

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        if tag == "img":
            self.srcs.append(attrs.get("src", ""))
        self.urls += [v for k, v in attrs.items() if k in ("src", "href", "action", "poster", "data") and v]
        self._in_probe = attrs.get("id") == "driftwise-probe"

    def handle_endtag(self, tag):
        self._in_probe = False

    def handle_data(self, data):
        if self._in_probe:
            self.probe.append(data)


def _parse(text: str) -> _Images:
    parser = _Images()
    parser.feed(text)
    return parser


_PROBE = """<script>
window.addEventListener('load', function () {
  var imgs = Array.prototype.map.call(document.images, function (im) {
    return {complete: im.complete, width: im.naturalWidth, height: im.naturalHeight};
  });
  var out = document.createElement('pre');
  out.id = 'driftwise-probe';
  out.textContent = JSON.stringify({images: imgs, text: document.body.innerText});
  document.body.appendChild(out);
});
</script>"""


def _probe_copy(page: str) -> str:
    policy = "default-src 'none'; img-src data:; style-src 'unsafe-inline'"
    assert policy in page, "the report's Content-Security-Policy changed; update the probe"
    page = page.replace(policy, policy + "; script-src 'unsafe-inline'")
    return page.replace("</body>", _PROBE + "</body>")


@pytest.fixture(scope="module")
def rendered(tmp_path_factory):
    browser = _chromium()
    tmp = tmp_path_factory.mktemp("report")
    summary = _summary(tmp)
    path = report.write_report(summary, tmp / "report.html")
    page = path.read_text(encoding="utf-8")
    shot = tmp / "screenshot.png"
    _run(browser, tmp, f"--screenshot={shot}", "--window-size=1000,2600", path.as_uri())
    dom = _run(browser, tmp, "--dump-dom", "--virtual-time-budget=5000", path.as_uri()).stdout
    probe_path = tmp / "probe.html"
    probe_path.write_text(_probe_copy(page), encoding="utf-8")
    probe_dom = _run(browser, tmp, "--dump-dom", "--virtual-time-budget=5000", probe_path.as_uri()).stdout
    probe = json.loads(html.unescape("".join(_parse(probe_dom).probe)) or "null")
    return {"summary": summary, "page": page, "shot": shot, "dom": dom, "probe": probe}


def test_report_is_self_contained(rendered):
    page = rendered["page"]
    parsed = _parse(page)
    assert parsed.srcs and all(s.startswith("data:image/png;base64,") for s in parsed.srcs)
    assert all(u.startswith(("data:", "#")) for u in parsed.urls), [u[:60] for u in parsed.urls]
    assert "<script" not in page.lower()
    assert not re.search(r"url\(\s*['\"]?(https?:|//)", page)  # no remote CSS resources either
    assert "default-src 'none'" in page


def test_screenshot_shows_the_page(rendered):
    with Image.open(rendered["shot"]) as img:
        img.load()
        grey = np.asarray(img.convert("L"), float)
        assert img.size == (1000, 2600)
    # a rendered page with text and figures: many non-white pixels, and dark text strokes
    assert (grey < 250).mean() > 0.05
    assert (grey < 60).mean() > 0.002


def test_every_image_decoded_in_the_browser(rendered):
    probe = rendered["probe"]
    assert probe is not None, "the probe script did not run"
    srcs = _parse(rendered["page"]).srcs
    assert len(probe["images"]) == len(srcs) == 2
    for info, src in zip(probe["images"], srcs):
        assert info["complete"] and info["width"] > 0 and info["height"] > 0, info
        with Image.open(io.BytesIO(base64.b64decode(src.split(",", 1)[1]))) as png:
            png.load()
            assert png.format == "PNG"
            assert (info["width"], info["height"]) == png.size
    # the unmodified report, under its own policy, keeps the same images in its DOM
    assert _parse(rendered["dom"]).srcs == srcs


def test_key_numbers_in_the_rendered_text(rendered):
    text = " ".join(rendered["probe"]["text"].split())  # also turns the thin spaces of 3 457 into spaces
    for needle in ("11.8 m²/s", "1.5 h", "0.247 m/s", "4.15 km", "0.712", "0.634", "0.551", "0.93",
                   "0.271", "3 457", "< 0.001", "36", "helmholtz", "Fuel spill at the harbour mouth",
                   "the divergent part holds 0.183 of the velocity variance",
                   "a naive ISO time was taken as UTC", "driftwise demo --out /tmp/demo-out",
                   f"driftwise {__version__}", " ".join(CAUTION.split())):
        assert needle in text, needle
    assert re.search(r"divergence-free\s+no", text) and re.search(r"curl-free\s+no", text)


def test_untrusted_text_is_escaped(tmp_path):
    summary = {"warnings": ["<script>alert(1)</script> in track id"], "title": "<b>x</b>"}
    page = report.render_report(summary)
    assert "<script>" not in page and "&lt;script&gt;alert(1)&lt;/script&gt;" in page
    assert "<b>x</b>" not in page


def test_missing_section_is_reported_honestly():
    page = report.render_report({"missing": [{"section": "skill", "reason": "skill.py is not available"}]})
    assert "Not produced: skill.py is not available" in page
    assert report.render_report({}).count("<h2") == 3  # job, warnings, provenance only


def test_units_follow_the_key_names():
    # the project's naming rule: the unit is the suffix of the name
    assert report.label_of("diffusivity_m2_s") == "diffusivity (m²/s)"
    assert report.label_of("velocity_scale_m_s") == "velocity scale (m/s)"
    assert report.label_of("length_scale_m") == "length scale (m)"
    assert report.label_of("decorrelation_time_s") == "decorrelation time (s)"
    assert report.label_of("length_scale_m", with_unit=False) == "length scale"     # the value carries it
    # lengths, durations, speeds, diffusivities in the unit that fits (driftwise.units; 3 significant figures)
    assert report.fmt(86400.0, "s") == "24 h"
    assert report.fmt(5e-4, "m") == "0.5 mm" and report.fmt(12345.0, "m") == "12.3 km"
    assert report.fmt(0.002, "m/s") == "2 mm/s" and report.fmt(1e-5, "m²/s") == "10 mm²/s"
    page = report.key_value_table({"length_scale_m": 0.0123, "fit": {"decorrelation_time_s": 5400.0}})
    assert ">length scale</th><td class=\"num\">12.3 mm</td>" in page
    assert ">fit / decorrelation time</th><td class=\"num\">1.5 h</td>" in page and "0.0123" not in page
    assert report.fmt(0.000123456) == "0.0001235"
    assert report.fmt(float("nan")) == "—" and report.fmt(None) == "—" and report.fmt(True) == "yes"


def test_probability_and_coordinate_columns():
    assert [report.fmt_probability(p) for p in (0.0, 3e-11, 0.0006, 0.63194, 1.0)] == \
        ["0.000", "< 0.001", "0.001", "0.632", "1.000"]
    page = report.grid_table(["lon (°)", "P (–)"], [[-8.935123, 0.5]], ["degrees", "probability"])
    assert '<td class="num">-8.93512</td><td class="num">0.500</td>' in page


def test_a_non_png_figure_is_a_clear_error(tmp_path):
    from driftwise.errors import InputError

    bad = tmp_path / "fig.png"
    bad.write_bytes(b"GIF89a...")
    with pytest.raises(InputError, match="is not a PNG"):
        report.render_report({"fit": {"kernel": "x"}, "figures": [{"path": str(bad), "section": "fit"}]})


# ----------------------------------------------------------------- ELBOs, alerts, width and print
def test_check_and_fit_elbos_are_explained_per_observation():
    summary = {"fit": {"kernel": "helmholtz", "elbo": 8694.95, "n_observations": 2880},
               "check": {"families": {"helmholtz": {"elbo": 6966.0, "n_observations": 2304},
                                      "divergence-free": {"elbo": 6900.0, "n_observations": 2304}}}}
    page = report.render_report(summary)
    text = " ".join(html.unescape(re.sub(r"<[^>]+>", " ", page)).split())
    # 8694.95 / 2880 = 3.019 and 6966 / 2304 = 3.023 nats per observation (the arithmetic of the note)
    assert "8695 nats) is a sum over all 2 880 velocity observations" in text.replace("\u2009", " ")
    assert "3.019 nats per observation" in text
    assert "2 304 observations" in text.replace("\u2009", " ")
    assert "helmholtz 3.023; divergence-free 2.995 nats" in text
    # without the check's observation counts there is nothing to compare, and no note
    summary["check"]["families"]["helmholtz"].pop("n_observations")
    summary["check"]["families"]["divergence-free"].pop("n_observations")
    assert "Why these ELBOs differ" not in report.render_report(summary)


def test_spread_alerts_are_boxed_before_the_table():
    page = report.render_report({"spread": [{"name": "spill", "alerts": ["poor Gaussian summary: use the ensemble"],
                                             "columns": ["time (h)"], "rows": [[1.0]], "notes": ["a note"]}]})
    alert = page.index('<p class="alert">poor Gaussian summary: use the ensemble</p>')
    assert alert < page.index("<table") < page.index("<p>a note</p>")


_WIDTH_PROBE = """<script>
window.addEventListener('load', function () {
  var out = document.createElement('pre');
  out.id = 'driftwise-probe';
  var right = Array.prototype.map.call(document.querySelectorAll('img, p, h2'), function (el) {
    return el.getBoundingClientRect().right; });
  out.textContent = JSON.stringify({scroll: document.documentElement.scrollWidth, inner: window.innerWidth,
                                    right: Math.max.apply(null, right),
                                    font: parseFloat(getComputedStyle(document.body).fontSize)});
  document.body.appendChild(out);
});
</script>"""


def test_readable_at_1200_px_and_prints_to_pages(rendered, tmp_path):
    browser = _chromium()
    page = _probe_copy(rendered["page"]).replace(_PROBE, _WIDTH_PROBE)
    probe_path = tmp_path / "width.html"
    probe_path.write_text(page, encoding="utf-8")
    dom = _run(browser, tmp_path, "--dump-dom", "--window-size=1200,2000", "--virtual-time-budget=5000",
               probe_path.as_uri()).stdout
    probe = json.loads(html.unescape("".join(_parse(dom).probe)))
    # no horizontal scrolling of the page at 1200 px; text, figures and headings inside the window
    assert probe["inner"] == 1200 and probe["scroll"] <= 1200 and probe["right"] <= 1200
    assert probe["font"] >= 14  # px: the browser's default body text size, not shrunk
    # a print stylesheet: page size and margins, no figure or boxed note split across pages
    assert "@media print" in rendered["page"] and "@page{size:A4" in rendered["page"]
    assert re.search(r"@media print\{.*figure,[^{]*\{break-inside:avoid", rendered["page"], re.DOTALL)
    pdf = tmp_path / "report.pdf"
    _run(browser, tmp_path, f"--print-to-pdf={pdf}", "--no-pdf-header-footer", Path(rendered["shot"]).parent.joinpath(
        "report.html").as_uri())
    data = pdf.read_bytes()
    pages = len(re.findall(rb"/Type\s*/Page(?!s)", data))
    assert data.startswith(b"%PDF") and 1 <= pages <= 6, pages
