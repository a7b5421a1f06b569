"""End-to-end: the demo run's report opened in headless Chromium (Python playwright driving the system browser).

Skipped when Chromium or playwright is missing, unless LASECYTO_REQUIRE_BROWSER=1 (set by .ci/run), which
turns the skip into a failure.  Reuses the session run of the demo experiment (``fp_run``).
"""

import os
import shutil
import tempfile
from pathlib import Path

import pytest

pytestmark = pytest.mark.slow

FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync"]


def _chromium():
    """Path of the Chromium executable, or skip (fail when LASECYTO_REQUIRE_BROWSER=1)."""
    required = os.environ.get("LASECYTO_REQUIRE_BROWSER", "") not in ("", "0")
    path = os.environ.get("LASECYTO_CHROMIUM") or shutil.which("chromium") or shutil.which("chromium-browser")
    problem = None
    if path is None or not Path(path).is_file():
        problem = "Chromium not found (install the system package 'chromium')"
    else:
        try:
            import playwright.sync_api  # noqa: F401
        except ImportError:
            problem = "Python package 'playwright' not installed (pip install -e '.[dev]')"
    if problem:
        if required:
            pytest.fail(f"LASECYTO_REQUIRE_BROWSER is set but {problem}")
        pytest.skip(problem)
    return path


def _order(page, column):
    """The sort keys (data-v) of a column of the cell table, in displayed order."""
    return page.eval_on_selector_all(
        "#cell-table tbody tr", f"rows => rows.map(r => r.cells[{column}].getAttribute('data-v'))")


def test_report_renders_and_sorts_in_chromium(fp_run, tmp_path):
    executable = _chromium()
    from playwright.sync_api import sync_playwright

    report = Path(fp_run.report)
    assert report.is_file()
    errors, requests = [], []
    with sync_playwright() as p, tempfile.TemporaryDirectory(dir=tmp_path) as profile:
        context = p.chromium.launch_persistent_context(profile, executable_path=executable, args=FLAGS,
                                                       headless=True, viewport={"width": 1280, "height": 900})
        try:
            page = context.new_page()
            page.on("console", lambda m: errors.append(f"console {m.type}: {m.text}")
                    if m.type in ("error", "warning") else None)
            page.on("pageerror", lambda e: errors.append(f"page error: {e}"))
            page.on("request", lambda r: requests.append(r.url))
            page.goto(report.as_uri(), wait_until="load")

            # it rendered: title, sections, the figures above the fold decoded
            assert page.title().startswith("lasecyto report")
            for section in ("summary", "failures", "traces", "onsets", "classifier", "cell-list", "cells"):
                assert page.locator(f"section#{section} h2").is_visible(), section
            for sel in ("#traces img", "#onsets img"):
                page.locator(sel).scroll_into_view_if_needed()
                page.wait_for_function(f"document.querySelector('{sel}').complete")
                assert page.eval_on_selector(sel, "img => img.naturalWidth") > 100, sel

            # the cell table sorts by a numeric column (mouse), both ways, missing values last
            n_rows = page.locator("#cell-table tbody tr").count()
            assert n_rows == 24
            heads = page.eval_on_selector_all("#cell-table thead th", "hs => hs.map(h => h.textContent.trim())")
            col = heads.index("onset (s)")
            button = page.locator("#cell-table thead th").nth(col).locator("button")
            button.click()
            keys = _order(page, col)
            values = [float(k) for k in keys if k != "nan"]
            assert values == sorted(values) and len(values) >= 2
            assert all(k == "nan" for k in keys[len(values):])
            assert page.locator("#cell-table thead th").nth(col).get_attribute("aria-sort") == "ascending"
            button.click()
            values_down = [float(k) for k in _order(page, col) if k != "nan"]
            assert values_down == sorted(values, reverse=True)
            page.locator("#cell-list").screenshot(path=str(tmp_path / "cell-table-by-onset.png"))

            # ... and by a text column from the keyboard (focus, Enter)
            first = page.locator("#cell-table thead th").nth(0).locator("button")
            first.focus()
            page.keyboard.press("Enter")
            ids = _order(page, 0)
            assert ids == sorted(ids)
            page.keyboard.press("Enter")
            assert _order(page, 0) == sorted(ids, reverse=True)

            # the flag filter leaves the flagged rows only
            page.locator("#flagged-only").check()
            shown = page.eval_on_selector_all("#cell-table tbody tr:not([hidden])",
                                              "rows => rows.map(r => r.getAttribute('data-flagged'))")
            assert shown and set(shown) == {"1"} and len(shown) < n_rows
            page.locator("#flagged-only").uncheck()

            # a cell link opens its panel, whose figure decodes
            page.locator("#cell-table tbody a").first.click()
            target = page.evaluate("decodeURIComponent(location.hash.slice(1))")
            panel = page.locator(f"section#{target} img")
            panel.scroll_into_view_if_needed()
            page.wait_for_function(f"document.querySelector('section#{target} img').complete")
            assert page.eval_on_selector(f"section#{target} img", "img => img.naturalWidth") > 100
            page.locator(f"section#{target}").screenshot(path=str(tmp_path / "cell-panel.png"))

            page.evaluate("window.scrollTo(0, 0)")
            shot = tmp_path / "report.png"
            page.screenshot(path=str(shot), full_page=False)
        finally:
            context.close()
    shots = [shot, tmp_path / "cell-table-by-onset.png", tmp_path / "cell-panel.png"]
    print("screenshots of the report: " + ", ".join(str(s) for s in shots))
    assert all(s.stat().st_size > 10_000 for s in shots)
    assert errors == []
    external = [u for u in requests if not u.startswith(("file:", "data:", "about:"))]
    assert external == []
