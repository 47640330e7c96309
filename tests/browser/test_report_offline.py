"""The HTML report stands alone: opened from a file in Chromium it fetches
nothing, neither from the network nor beside it (every request other than
the file itself is recorded and refused), and still draws its figures and
shows its scores."""

from __future__ import annotations

import time

import pytest

import quietlayer.app.page  # noqa: F401 - as in the page's process: Panel, once imported, adds scripts to Bokeh's
from quietlayer.app.cli import main

from .conftest import REPO, VIEWPORT

pytestmark = pytest.mark.browser

DEMO = REPO / "assets" / "presets" / "demo.toml"

# every canvas Bokeh drew (through the shadow roots its views live in): its size and
# how many of its pixels are not blank or near-white
CANVASES_JS = """() => {
  const found = [];
  const walk = (root) => {
    for (const e of root.querySelectorAll("*")) {
      if (e.tagName === "CANVAS" && e.width > 0 && e.height > 0) {
        const d = e.getContext("2d").getImageData(0, 0, e.width, e.height).data;
        let inked = 0;
        for (let i = 0; i < d.length; i += 4)
          if (d[i + 3] > 0 && (d[i] < 240 || d[i + 1] < 240 || d[i + 2] < 240)) inked++;
        found.push([e.width, e.height, inked]);
      }
      if (e.shadowRoot) walk(e.shadowRoot);
    }
  };
  walk(document);
  return found;
}"""
FIGURES = 8  # two field images, three curve figures, three layer-profile figures
FIGURE_TITLES_JS = """() => window.Bokeh ? window.Bokeh.documents.flatMap(d => d.roots())
    .map(r => r.title ? String(r.title.text) : "") : []"""


def open_offline(browser, path):
    """Open a local HTML file with every other request refused (another file
    beside it too); returns (page, context, refused addresses)."""
    refused: list[str] = []
    own = path.as_uri()

    def file_only(route):
        url = route.request.url
        if url == own or url.startswith(("data:", "blob:")):
            route.continue_()
        else:
            refused.append(url)
            route.abort()

    context = browser.new_context(viewport=VIEWPORT)
    context.route("**/*", file_only)
    page = context.new_page()
    page.goto(path.as_uri(), wait_until="load")
    return page, context, refused


def test_exported_report_renders_offline(browser, tmp_path, capsys):
    code = main(["export", str(DEMO), "--out", str(tmp_path), "--no-late"])
    out, err = capsys.readouterr()
    assert code == 0, out + err
    printed = float(err.split("worst peak error ")[1].split(" dB")[0])  # the command's own measurement
    report = tmp_path / "demo.report.html"
    text = report.read_text("utf-8")
    assert "<link" not in text and " src=" not in text  # nothing to fetch, by construction
    page, context, refused = open_offline(browser, report)
    try:
        page.wait_for_function("() => window.Bokeh && window.Bokeh.documents.length > 0", timeout=30_000)
        titles = page.evaluate(FIGURE_TITLES_JS)
        assert sum(t.startswith("total field") for t in titles) == 1, titles
        assert any(t.startswith("reflection spectrum") for t in titles), titles
        drawn = lambda: [c for c in page.evaluate(CANVASES_JS) if c[0] > 100 and c[1] > 100 and c[2] > 1000]
        deadline = time.monotonic() + 30
        while len(drawn()) < FIGURES and time.monotonic() < deadline:
            page.wait_for_timeout(100)
        # each figure's plot canvas carries ink (the overlay canvas above it and legend swatches do not count)
        assert len(drawn()) == FIGURES, page.evaluate(CANVASES_JS)
        headline = " ".join(page.locator("#headline").inner_text().split())
        shown = float(headline.split("Worst peak error ")[1].split(" dB")[0])
        assert shown == printed, headline
        assert "certifies no RF-exposure" in page.locator("blockquote").inner_text()
        page.wait_for_timeout(500)  # anything the scripts would fetch late
        artifacts = REPO / "test-artifacts"
        artifacts.mkdir(exist_ok=True)
        page.screenshot(path=str(artifacts / "report.png"), full_page=True)
    finally:
        context.close()
    assert refused == [], f"the report asked for {len(refused)} other addresses: {refused[:5]}"
