"""The report in a real browser: Debian's chromium, headless, driven over the DevTools protocol.

Checks (issue 7): no console errors, every image has a non-zero natural size, the headline and each
section heading are present, a full-page screenshot is written, no network request, and a
jurisdiction named ``<script>alert(1)</script>`` shows as text while no script runs.

Skipped when chromium is missing, unless BAYESDID_REQUIRE_BROWSER=1 (set by .ci/run, which installs
chromium first), in which case a missing browser fails the test.
"""

from __future__ import annotations

import base64
import json
import os
from pathlib import Path

import pytest
from cdp_client import Browser, find_chromium
from e2e_runs import MATRIX
from report_fixtures import SCRIPT_NAME, write_fake_run

from bayesdid.cli import main
from bayesdid.report import HEADINGS, write_report
from bayesdid.report.words import headline_of

CHROMIUM = find_chromium()
if CHROMIUM is None:
    if os.environ.get("BAYESDID_REQUIRE_BROWSER") == "1":
        raise RuntimeError(
            "chromium is required (BAYESDID_REQUIRE_BROWSER=1) but not installed; run `apt-get install -y chromium`"
        )
    pytest.skip("chromium not installed (apt-get install -y chromium)", allow_module_level=True)

#: Where the full-page screenshots are kept for inspection (runs/ is not tracked by git).
SCREENS = Path(os.environ.get("BAYESDID_SCREENSHOTS", Path(__file__).resolve().parent.parent / "runs" / "screens"))
SCREENS.mkdir(parents=True, exist_ok=True)

PAGE_FACTS = """(() => ({
  images: [...document.images].map(i => [i.naturalWidth, i.naturalHeight, i.complete]),
  headings: [...document.querySelectorAll('h2')].map(h => h.textContent),
  headline: (document.querySelector('.headline') || {}).textContent || '',
  text: document.body.innerText,
  scripts: document.scripts.length,
  pwned: typeof window.__pwned !== 'undefined',
}))()"""


def _network(browser: Browser, page: Path) -> list[str]:
    """Requests other than the page itself and its inline data: images."""
    own = page.resolve().as_uri()
    return [u for u in browser.requests() if u != own and not u.startswith("data:")]


@pytest.fixture(scope="session")
def demo_run(tmp_path_factory):
    """The demo case fitted once with small draws (one compile), ending with its report."""
    out = tmp_path_factory.mktemp("demo") / "run"
    code = main(["demo", "--out", str(out), "--draws", "300", "--tune", "300", "--quiet"])
    assert code == 0
    return out


def test_demo_report_in_chromium(demo_run, capsys):
    page = demo_run / "report.html"
    assert page.is_file(), "bayesdid demo must end with the report"
    summary = json.loads((demo_run / "summary.json").read_text())
    with Browser(CHROMIUM) as b:
        b.open(page)
        facts = b.evaluate(PAGE_FACTS)
        shot = b.screenshot(SCREENS / "demo_report.png")
        assert b.errors() == []
        assert _network(b, page) == []
        assert b.dialogs() == []
    assert facts["images"] and all(w > 0 and h > 0 and ok for w, h, ok in facts["images"])
    assert len(facts["images"]) >= 7  # the demo runs every check and a sweep: every figure is drawn
    assert facts["headings"] == [h for _, h in HEADINGS]
    study = json.loads((demo_run / "manifest.json").read_text())["study"]
    assert " ".join(facts["headline"].split()).startswith(headline_of(summary, study))
    assert facts["scripts"] == 0
    assert shot.stat().st_size > 50_000 and shot.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    with capsys.disabled():
        print(f"\nfull-page screenshot of the demo report: {shot}")


def test_script_named_jurisdiction_is_text_and_nothing_runs(tmp_path):
    run = write_fake_run(tmp_path / "xss", adopters=("Norvale", SCRIPT_NAME), title=f"Valmora {SCRIPT_NAME}")
    page = write_report(run)
    with Browser(CHROMIUM) as b:
        b.open(page)
        facts = b.evaluate(PAGE_FACTS)
        b.screenshot(SCREENS / "script_name_report.png")
        pdf = base64.b64decode(b.send("Page.printToPDF", printBackground=True)["data"])
        assert b.dialogs() == []
        assert b.errors() == []
        assert _network(b, page) == []
    assert SCRIPT_NAME in facts["text"]  # shown as the literal name
    assert facts["text"].count(SCRIPT_NAME) >= 3  # title, per-adopter table, data table
    assert facts["scripts"] == 0 and not facts["pwned"]
    # a fit-only folder: the effect, per-adopter (two adopters) and cross-check figures (checks and sweeps
    # come from the commands; this posterior.nc holds no cell means, so no raw-data figure)
    assert len(facts["images"]) == 3 and all(w > 0 for w, _, _ in facts["images"])
    assert facts["headings"] == [h for _, h in HEADINGS]
    assert pdf[:5] == b"%PDF-" and pdf.count(b"/Type /Page") - pdf.count(b"/Type /Pages") >= 3  # prints


def test_the_detectors_see_a_script_a_console_error_and_a_fetch(tmp_path):
    """Control: the same checks catch an unescaped name, an error and a network request."""
    page = tmp_path / "bad.html"
    page.write_text(
        "<!DOCTYPE html><html><body><p>Region <script>alert(1)</script></p>"
        "<script>console.error('boom')</script><img src='http://127.0.0.1:9/x.png'></body></html>"
    )
    with Browser(CHROMIUM, timeout=30) as b:
        b.open(page)
        assert b.dialogs() == ["1"]
        assert any("boom" in e for e in b.errors())
        assert _network(b, page) == ["http://127.0.0.1:9/x.png"]
        assert b.evaluate("document.images[0].naturalWidth") == 0


@pytest.mark.parametrize("name", MATRIX)
def test_end_to_end_reports_in_chromium(name, e2e_run, capsys):
    """The reports of the end-to-end matrix (real fit, checks, sweep) open cleanly, every figure drawn."""
    page = e2e_run(name)["run"] / "report.html"
    with Browser(CHROMIUM) as b:
        b.open(page)
        facts = b.evaluate(PAGE_FACTS)
        shot = b.screenshot(SCREENS / f"e2e_{name}.png")
        assert b.errors() == []
        assert _network(b, page) == []
    assert len(facts["images"]) >= 7 and all(w > 0 and h > 0 and ok for w, h, ok in facts["images"])
    assert facts["headings"] == [h for _, h in HEADINGS]
    assert "could not be drawn" not in facts["text"] and "Not available in this run folder" not in facts["text"]
    with capsys.disabled():
        print(f"\nfull-page screenshot of the {name} report: {shot}")
