"""The report page in a real headless browser (Debian's chromium driven by playwright): it loads with no
console error and no network request, shows the lots, the hold and the caution, and prints one product per page."""

from __future__ import annotations

import os
import shutil
from pathlib import Path

import pytest
from playwright.sync_api import ConsoleMessage, Dialog, sync_playwright

from monitor.report import render_report
from monitor.report.model import Report

REPO = Path(__file__).resolve().parents[2]
SCREENSHOT_COPY = REPO / "docs" / "report-example.png"


def _chromium() -> str:
    for name in ("chromium", "chromium-browser"):
        found = shutil.which(name)
        if found:
            return found
    pytest.fail("no system chromium on PATH; install it with `apt-get install -y chromium` (Debian)")


def test_report_page_in_headless_chromium(brackenfield_report: Report, tmp_path: Path) -> None:
    page_file = tmp_path / "report.html"
    page_file.write_text(render_report(brackenfield_report), encoding="utf-8")
    url = page_file.as_uri()
    console: list[str] = []
    page_errors: list[str] = []
    requests: list[str] = []
    dialogs: list[str] = []
    with sync_playwright() as pw:
        browser = pw.chromium.launch(executable_path=_chromium(), headless=True,
                                     args=["--no-sandbox", "--disable-gpu"])
        try:
            page = browser.new_page(viewport={"width": 1366, "height": 1200})
            def on_console(message: ConsoleMessage) -> None:
                if message.type in ("error", "warning"):
                    console.append(f"{message.type}: {message.text}")

            def on_dialog(dialog: Dialog) -> None:
                dialogs.append(dialog.message)
                dialog.dismiss()

            page.on("console", on_console)
            page.on("pageerror", lambda e: page_errors.append(str(e)))
            page.on("request", lambda r: requests.append(r.url))
            page.on("dialog", on_dialog)
            page.goto(url, wait_until="load")
            # A positive signal that the page is complete: the last section's rule text is rendered.
            page.locator("section.product").last.locator("pre.rule").wait_for(state="visible")

            assert console == []
            assert page_errors == []
            assert dialogs == []
            assert requests == [url]          # the file itself, nothing else

            for lot in ("L1-2611-01", "L1-2611-06", "L1-2611-07", "L1-2611-08", "L2-2611-03"):
                assert page.locator(f"table.lots tr[data-lot='{lot}']").is_visible(), lot
            # Both holds are marked in the chart and in the table.
            held = page.locator("svg.means g.lot[data-verdict='hold']")
            assert held.count() == 2
            assert all(held.nth(i).is_visible() for i in range(2))
            assert page.locator("svg.means g[data-lot='L1-2611-07'] text.holdmark").text_content() == "HOLD"
            assert page.locator("tr[data-lot='L1-2611-07'] .badge").inner_text().strip().lower() == "hold"
            # The undisposed hold shows as open, the released one with its disposition.
            assert page.locator("tr[data-lot='L1-2611-07']").inner_text().find("open") >= 0
            assert "release" in page.locator("tr[data-lot='L1-2611-06']").inner_text()
            caution = page.locator("#caution")
            assert caution.is_visible()
            assert "competent authority" in caution.inner_text()
            assert "weights-and-measures law" in caution.inner_text()
            # The drifting head (H4 in the invented scenario) is the flagged one.
            assert (page.locator("svg.heads text.flag").text_content() or "").strip().endswith("H4")

            (tmp_path / "report-full.png").write_bytes(page.screenshot(full_page=True))
            shot = tmp_path / "report.png"
            page.screenshot(path=str(shot), full_page=False)
            assert shot.stat().st_size > 10_000
            if os.environ.get("LOTWARDEN_SAVE_SCREENSHOT") == "1":
                SCREENSHOT_COPY.parent.mkdir(parents=True, exist_ok=True)
                shutil.copyfile(shot, SCREENSHOT_COPY)

            screen_breaks = page.eval_on_selector_all(
                "section.product", "els => els.map(e => getComputedStyle(e).breakBefore)")
            page.emulate_media(media="print")
            print_breaks = page.eval_on_selector_all(
                "section.product", "els => els.map(e => getComputedStyle(e).breakBefore)")
            assert screen_breaks == ["auto", "auto"]
            assert print_breaks == ["auto", "page"]     # one product per printed page
            pdf = page.pdf(path=str(tmp_path / "report.pdf"), format="A4")
            assert pdf[:4] == b"%PDF"
        finally:
            browser.close()
