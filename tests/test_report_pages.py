"""The HTML pages of a batch (index.html, one report.html per input): labels instead of
summary keys, numbers to a few significant figures, links that resolve, a viewport meta and a
print stylesheet; and, in a real headless browser (Debian's chromium driven by Playwright,
skipped where either is missing), no console error, every image decoded, no horizontal scroll
in a 1200 px window, the navigation hidden in print."""
from __future__ import annotations

import re
import shutil
from html.parser import HTMLParser
from pathlib import Path
from urllib.parse import unquote, urlparse

import pytest
from click.testing import CliRunner

from sheetview.cli import main
from sheetview.report import PAGE_GROUPS, fmt_number

CHROMIUM = shutil.which("chromium") or "/usr/bin/chromium"


@pytest.fixture(scope="module")
def pages(tmp_path_factory):
    """A batch of two inputs (one unreadable) with plots and pages."""
    d = tmp_path_factory.mktemp("pages")
    good = Path("sample_structures/single_stack.csv").resolve()
    bad = d / "broken.csv"
    bad.write_text("not,a,structure\n1,2\n")
    out = d / "out"
    r = CliRunner().invoke(main, ["batch", str(good), str(bad), "-o", str(out), "--voxel", "0.3",
                                  "--lines", "300", "--no-intrusion",
                                  "--only", "stacking,order,phases,surface,pores,chords", "-q"])
    assert (out / "index.html").is_file(), r.output
    page = next((out / "runs").glob("*/report.html"))
    return out, page


class _Links(HTMLParser):
    def __init__(self):
        super().__init__()
        self.hrefs, self.text, self.metas = [], [], []
        self._skip = 0

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if tag == "a" and "href" in a:
            self.hrefs.append(a["href"])
        if tag == "meta":
            self.metas.append(a)
        if tag in ("style", "script"):
            self._skip += 1

    def handle_endtag(self, tag):
        if tag in ("style", "script"):
            self._skip -= 1

    def handle_data(self, data):
        if not self._skip:
            self.text.append(data)


def _parse(path):
    p = _Links()
    p.feed(Path(path).read_text())
    return p


def _local_targets(page, hrefs):
    for h in hrefs:
        u = urlparse(h)
        if u.scheme or h.startswith("#"):
            continue
        yield h, (Path(page).parent / unquote(u.path)).resolve()


def test_pages_read_like_a_report(pages):
    out, page = pages
    for html_file in (out / "index.html", page):
        p = _parse(html_file)
        assert any(m.get("name") == "viewport" for m in p.metas)
        text = html_file.read_text()
        assert "@media print" in text
        for href, target in _local_targets(html_file, p.hrefs):
            assert target.is_file(), (html_file.name, href)
        visible = " ".join(p.text)
        # labels, not the summary's dotted keys; no long unrounded floats
        assert "volume_fractions.solid" not in visible and "order.S" not in visible
        assert not re.search(r"\d\.\d{6,}", visible), re.search(r"\d\.\d{6,}", visible)
    p = _parse(page)
    visible = " ".join(p.text)
    for title in ("Structure", "Stacks and order", "Pores", "Surfaces", "Settings and provenance"):
        assert title in visible
    assert "Order parameter S" in visible and "Solid (volume fraction)" in visible
    # the page links back to the index and to its own JSON and CSV files
    assert "../../index.html" in p.hrefs and "summary.json" in p.hrefs
    assert any(h.endswith(".csv") for h in p.hrefs)
    # the index links each page and names the failure
    idx = _parse(out / "index.html")
    assert any(h.endswith("/report.html") for h in idx.hrefs)
    assert "failed" in " ".join(idx.text)
    # the settings come after the measured groups
    assert visible.index("Settings and provenance") > visible.index("Pores")


def test_group_order_is_that_of_a_reader():
    assert [g[0] for g in PAGE_GROUPS] == ["structure", "stacks", "pores", "surfaces",
                                          "experiment"]


@pytest.mark.parametrize("value,text", [
    (0.0727187, "0.0727"), (2.4907407, "2.49"), (6480, "6\u2009480"), (0.5, "0.500"),
    (123.456, "123"), (None, "–"), (float("nan"), "–"), (1.5e-5, "1.50 × 10⁻⁵"), (0.0, "0")])
def test_numbers_to_three_significant_figures(value, text):
    """Three significant figures (common practice for reporting measured quantities)."""
    assert fmt_number(value) == text


def _browser():
    sync_api = pytest.importorskip("playwright.sync_api")
    if not Path(CHROMIUM).exists():
        pytest.skip("no chromium at /usr/bin/chromium")
    return sync_api


def test_pages_in_a_headless_browser(pages):
    sync_api = _browser()
    out, page = pages
    with sync_api.sync_playwright() as pw:
        try:
            b = pw.chromium.launch(executable_path=CHROMIUM, args=["--no-sandbox"])
        except Exception as exc:  # noqa: BLE001 - a browser that does not start
            pytest.skip(f"chromium does not start: {exc}")
        try:
            for f in (out / "index.html", page):
                pg = b.new_page(viewport={"width": 1200, "height": 900})
                errors = []
                pg.on("console", lambda m: errors.append(m.text) if m.type == "error" else None)
                pg.on("pageerror", lambda exc: errors.append(str(exc)))
                pg.goto(f.resolve().as_uri())
                assert errors == [], (f.name, errors)
                width = pg.evaluate("document.documentElement.scrollWidth")
                assert width <= 1200, (f.name, width)
                bad = pg.evaluate("[...document.images].filter(i => !(i.complete && "
                                  "i.naturalWidth > 0)).length")
                assert bad == 0, f.name
                hrefs = pg.evaluate("[...document.querySelectorAll('a[href]')]"
                                    ".map(a => a.getAttribute('href'))")
                for href, target in _local_targets(f, hrefs):
                    assert target.is_file(), (f.name, href)
                for href in hrefs:
                    if href.startswith("#"):
                        assert pg.evaluate(f"!!document.getElementById({href[1:]!r})"), href
                # anchors inside the page and the print view
                pg.emulate_media(media="print")
                nav = pg.evaluate("(() => { const n = document.querySelector('nav'); return n ? "
                                  "getComputedStyle(n).display : 'none'; })()")
                assert nav == "none"
                pg.close()
        finally:
            b.close()


def test_an_undefined_value_shows_no_unit(tmp_path):
    """A headline number the run did not compute (null in summary.json) reads as a dash
    without its unit."""
    import json

    from sheetview.report import structure_page
    (tmp_path / "summary.json").write_text(json.dumps(
        {"file": "x.npz", "pore_size": {"d50_nm": None, "d10_nm": 2.0}, "settings": {}}))
    page = structure_page(tmp_path)
    assert ">–</td>" in page and "2.00 nm" in page and "– nm" not in page


def test_measure_report_folder_has_its_page(tmp_path):
    """`measure -o` writes report.html beside summary.json (listed in the folder's manifest);
    its links resolve inside the folder and it has no link to a batch index."""
    out = tmp_path / "rep"
    r = CliRunner().invoke(main, ["measure", "sample_structures/single_stack.csv", "-o", str(out),
                                  "--only", "stacking,order,phases", "--voxel", "0.3", "-q"])
    assert r.exit_code == 0, r.output
    page = out / "report.html"
    assert page.is_file() and "report.html" in (out / ".sheetview-files").read_text()
    p = _parse(page)
    assert "../../index.html" not in p.hrefs and "summary.json" in p.hrefs
    for href, target in _local_targets(page, p.hrefs):
        assert target.is_file(), href
