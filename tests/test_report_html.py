"""The shareable report.html: self-contained, ordered as promised, and really rendered.

References: the HTML Living Standard (which elements and attributes fetch resources
or run scripts: script, link, iframe, object, embed, img/src, href, url() in CSS,
on* event attributes); a real browser, Debian's headless Chromium, rendering the
file to a PNG screenshot, a DOM dump and a PDF (the PNG signature and the PDF
header are from the PNG and PDF specifications).
"""

from __future__ import annotations

import os
import re
import shutil
import subprocess
import tempfile
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest

import optfeed
from optfeed.report.html import STATUS_WORDS
from optfeed.report.text import CAUTION

from conftest import CONFIGS

FETCHING_TAGS = {"script", "link", "iframe", "object", "embed", "img", "video", "audio", "source", "frame",
                 "base", "form", "input", "meta"}


class Page(HTMLParser):
    """Every tag with its attributes, the text of each h1/h2, and the style text."""

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.tags, self.headings, self.style, self.text = [], [], [], []
        self._in = None

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))
        if tag in ("h1", "h2", "style", "p"):
            self._in = (tag, dict(attrs))
            if tag in ("h1", "h2"):
                self.headings.append([tag, dict(attrs).get("id"), ""])

    def handle_endtag(self, tag):
        if self._in and self._in[0] == tag:
            self._in = None

    def handle_data(self, data):
        if self._in and self._in[0] in ("h1", "h2"):
            self.headings[-1][2] += data
        elif self._in and self._in[0] == "style":
            self.style.append(data)
        self.text.append(data)


def parse(path) -> Page:
    p = Page()
    p.feed(Path(path).read_text(encoding="utf-8"))
    return p


@pytest.fixture(scope="module")
def check_run(tmp_path_factory):
    """The fast_microbe plan checked (it breaks the OTR and heat ceilings)."""
    out = tmp_path_factory.mktemp("report") / "run"
    result = optfeed.check(CONFIGS / "fast_microbe.yaml", CONFIGS / "fast_microbe_plan.csv")
    from optfeed.report import write_check_run

    write_check_run(result, out)
    return result, out


def test_report_needs_no_network_and_no_script(check_run):
    _, out = check_run
    page = parse(out / "report.html")
    tags = {t for t, _ in page.tags}
    # only <meta charset> and <meta name=viewport> are allowed of the fetching/acting tags
    assert tags & FETCHING_TAGS <= {"meta"}, tags & FETCHING_TAGS
    for tag, attrs in page.tags:
        for name, value in attrs.items():
            assert not name.startswith("on"), (tag, name)  # no event handler scripts
            if name in ("href", "xlink:href", "src", "action", "poster", "data", "srcset"):
                assert value.startswith("#"), (tag, name, value)  # in-page references only
            if tag == "meta" and name == "http-equiv":
                pytest.fail("meta http-equiv can load or refresh")
        style = attrs.get("style", "")
        assert "url(" not in style or re.fullmatch(r"[^()]*(url\(#[^)]+\)[^()]*)*", style), style
    css = "".join(page.style)
    assert "@import" not in css and not re.search(r"url\((?!#)", css)
    text = (out / "report.html").read_text()
    for url in re.findall(r"url\(([^)]*)\)", text):
        assert url.startswith("#"), url
    assert "<script" not in text.lower() and "javascript:" not in text.lower()


def test_every_figure_is_inline_and_every_reference_resolves(check_run):
    _, out = check_run
    text = (out / "report.html").read_text()
    page = parse(out / "report.html")
    files = sorted(p.stem for p in out.glob("*.svg"))
    assert files == ["figure-culture", "figure-feeds", "figure-limits"]
    figures = [attrs["id"] for tag, attrs in page.tags if tag == "figure"]
    assert sorted(figures) == files  # the folder's figures and the report's are the same drawings
    for name in figures:
        assert (out / f"{name}.svg").read_text(encoding="utf-8") in text
    for name in figures:
        block = text[text.index(f'<figure id="{name}">'):]
        block = block[:block.index("</figure>")]
        assert block.count("<svg") == 1 and block.count("<polyline") >= 5 and block.count("<text") > 20, name  # drawn
    ids = {attrs["id"] for _, attrs in page.tags if "id" in attrs}
    assert len(ids) == sum(1 for _, attrs in page.tags if "id" in attrs), "duplicate ids"
    refs = [attrs.get("xlink:href") or attrs.get("href") for tag, attrs in page.tags
            if attrs.get("xlink:href") or attrs.get("href")]
    refs += re.findall(r"url\(#([^)]+)\)", text)
    for ref in refs:
        assert ref.lstrip("#") in ids, ref


def test_status_comes_first_then_cautions_objective_limits_figures_schedule_provenance(check_run):
    result, out = check_run
    page = parse(out / "report.html")
    h1 = [h for h in page.headings if h[0] == "h1"]
    assert len(h1) == 1 and page.headings[0][0] == "h1"
    assert h1[0][2] == "2 limits are broken" and h1[0][1] == "status"
    keys = [attrs.get("id") for tag, attrs in page.tags if tag == "section"]
    order = ["cautions", "objective", "limits", "figures", "schedule", "provenance"]
    assert [k for k in keys if k in order] == order
    # the same caution text as the text report
    flat = " ".join(" ".join(page.text).split())
    assert " ".join(CAUTION.split()[1:]).lower() in flat.lower()
    # the digest and the versions are there
    assert result.record["problem_digest"] in flat and result.record["optfeed"] in flat
    # broken limits are marked, the others are not
    html = (out / "report.html").read_text()
    broken = re.findall(r'<tr class=broken><td>([^<]+)</td>', html)
    assert broken == [r.name for r in result.limits if r.violated] == ["OTR ceiling", "heat removal"]
    assert "@media print" in html and "break-inside:avoid" in html


def test_every_status_word_has_plain_words():
    from optfeed import status

    words = [v for k, v in vars(status).items() if k.isupper() and isinstance(v, str)]
    assert set(words) <= set(STATUS_WORDS)


def test_no_figures_still_writes_the_report(tmp_path):
    from optfeed.report import write_check_run

    r = optfeed.check(CONFIGS / "animal_cell.yaml", CONFIGS / "animal_cell_plan.csv")
    out = write_check_run(r, tmp_path / "run", figures=False)
    html = (out / "report.html").read_text()
    assert "Figures were not drawn" in html and "<svg" not in html
    assert not list(out.glob("*.png")) and not list(out.glob("*.svg"))
    assert '<h1 id="status">Within every limit</h1>' in html


# ------------------------------------------------------------------ a real browser

CHROMIUM_FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
                  "--disable-background-networking", "--disable-component-update", "--disable-sync"]


def chromium():
    found = shutil.which("chromium") or shutil.which("chromium-browser")
    if found is None:
        if os.environ.get("OPTFEED_REQUIRE_BROWSER"):
            pytest.fail("chromium is not installed, and CI (.ci/run) was to install it")
        pytest.skip("chromium is not installed (Debian: apt-get install chromium); .ci/run installs it")
    return found


def run_browser(args, tmp_path):
    profile = tempfile.mkdtemp(dir=tmp_path, prefix="profile-")
    return subprocess.run([chromium(), *CHROMIUM_FLAGS, f"--user-data-dir={profile}", *args],
                          capture_output=True, text=True, timeout=120)


def test_report_renders_in_headless_chromium(check_run, tmp_path):
    from PIL import Image

    result, out = check_run
    url = (out / "report.html").resolve().as_uri()
    shot = tmp_path / "shot.png"
    proc = run_browser([f"--screenshot={shot}", "--window-size=1100,1800", "--hide-scrollbars", url], tmp_path)
    assert shot.exists(), proc.stderr[-2000:]
    assert shot.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    img = np.asarray(Image.open(shot).convert("RGB")).astype(int)
    assert img.shape[:2] == (1800, 1100)
    assert img.std() > 20  # not blank
    # the status banner in the 'bad' tone, and the figures' simulated lines (INK), really drawn
    def near(rgb, hexcolour, tol=12):
        ref = np.array([int(hexcolour[i:i + 2], 16) for i in (1, 3, 5)])
        return np.all(np.abs(rgb - ref) <= tol, axis=-1)
    assert near(img[:150], "#f6e4e1").sum() > 20000
    assert near(img, "#17364a").sum() > 3000

    dom = run_browser(["--dump-dom", url], tmp_path)
    assert dom.returncode == 0, dom.stderr[-2000:]
    assert '<h1 id="status">2 limits are broken</h1>' in dom.stdout
    assert dom.stdout.count("<svg") == 3 and "OTR ceiling" in dom.stdout

    pdf = tmp_path / "report.pdf"
    printed = run_browser([f"--print-to-pdf={pdf}", "--no-pdf-header-footer", url], tmp_path)
    assert pdf.exists(), printed.stderr[-2000:]
    data = pdf.read_bytes()
    assert data[:5] == b"%PDF-"
    pages = len(re.findall(rb"/Type\s*/Page[^s]", data))
    assert 2 <= pages <= 12, pages  # the whole report on A4, figures not blown up to a page each


TINY = """
name: tiny
species:
  X: {initial: 1 g/L, description: biomass}
  S: {initial: 2 g/L, description: substrate}
parameters: {mu_max: 0.4 1/h, K_s: 0.1 g/L, Y_XS: 0.5 g/g}
rates:
  mu: monod(S, mu_max, K_s)
  q_S: mu / Y_XS
reactions: {X: mu * X, S: -q_S * X}
feeds:
  sugar: {composition: {S: 300 g/L}, max_rate: 40 mL/h}
vessel:
  initial_volume: 1 L
  working_volume: 1.3 L
  oxygen: {uptake: 30 * mu * X, transfer_max: 60 mmol/L/h}
limits:
  - {name: substrate ceiling, expression: S, max: 5 g/L}
horizon: {end_time: 10 h}
objective: {maximize: product_mass, product: X}
solver: {pump_steps: 8, elements_per_step: 2, starts: 2}
"""


def test_optimize_report_has_marginal_values_points_and_starts(write, tmp_path):
    from optfeed.optimize import optimize
    from optfeed.report import write_optimize_run

    r = optimize(write("tiny.yaml", TINY), workers=1)
    assert r.status == "optimal, verified", r.message
    out = write_optimize_run(r, tmp_path / "run")
    html = (out / "report.html").read_text()
    assert '<h1 id="status">Optimal and verified</h1>' in html
    # the OTR ceiling holds this optimum back: its marginal value is in the limit table, in words
    otr = next(v for v in r.limits if v.name == "OTR ceiling")
    assert otr.active and otr.marginal_max > 0
    row = re.search(r"<tr[^>]*><td>OTR ceiling</td>(.*?)</tr>", html).group(1)
    assert "on the limit" in row and f"{otr.marginal_max:.4g} g per 1 mmol/L/h more on its maximum" in row
    assert html.count("<svg") == 3 and "solver&#x27;s points" not in html  # legend text is drawn as paths
    # the schedule section lists every pump step, in the feed's unit
    sched = html[html.index('<section id="schedule">'):]
    sched = sched[:sched.index("</section>")]
    assert sched.count("<tr>") == 1 + 8 and "sugar [mL/h]" in sched
    pd = pytest.importorskip("pandas")
    starts = r.starts_frame()
    assert isinstance(starts, pd.DataFrame) and len(starts) == 2 and "objective [g]" in starts.columns
    assert r.limits_frame().loc["OTR ceiling", "active"]
    assert r.schedule_frame().shape == (8, 1)
