"""`lotwarden report` run as a real subprocess over the state a real daemon wrote, its page then opened in a
real headless chromium (Debian's, driven by playwright): no console error, no network request, every closed lot,
the holds marked, counts as the database holds them, the caution, and one product per printed page."""

from __future__ import annotations

import os
import shutil
import sqlite3
import subprocess
import sys
from datetime import datetime, timedelta
from pathlib import Path
from zoneinfo import ZoneInfo

import pytest
from playwright.sync_api import ConsoleMessage, sync_playwright
from record_run import CLOSED, RecordRun

REPO = Path(__file__).resolve().parents[2]
SCREENSHOT_COPY = REPO / "docs" / "report-example.png"
ZONE = ZoneInfo("Europe/Berlin")          # the record plant's timezone key


def lotwarden(*args: str | Path, timeout: float = 60) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "monitor", *map(str, args)], capture_output=True, text=True,
                          timeout=timeout, cwd=REPO)


def _chromium() -> str:
    for name in ("chromium", "chromium-browser"):
        found = shutil.which(name)
        if found:
            return found
    pytest.fail("no system chromium on PATH; install it with `apt-get install -y chromium` (Debian)")


def _period() -> tuple[str, str]:
    today = datetime.now(ZONE).date()
    return (today - timedelta(days=1)).isoformat(), (today + timedelta(days=1)).isoformat()


def _latest_verdicts(db: Path) -> dict[tuple[str, str], str]:
    """Each lot's latest verdict read straight from the sqlite file (not through the code under test)."""
    conn = sqlite3.connect(f"file:{db}?mode=ro", uri=True)
    try:
        rows = conn.execute("SELECT line, lot, verdict FROM verdicts WHERE id IN "
                            "(SELECT MAX(id) FROM verdicts GROUP BY line, product, lot)").fetchall()
        disposed = {r[0] for r in conn.execute("SELECT verdict_id FROM dispositions")}
        assert not disposed               # the module-wide run is never disposed of
    finally:
        conn.close()
    return {(line, lot): verdict for line, lot, verdict in rows}


def test_report_page_from_a_real_run_in_headless_chromium(record_run: RecordRun, tmp_path: Path) -> None:
    since, until = _period()
    out = tmp_path / "report.html"
    done = lotwarden("report", "--config", record_run.config, "--since", since, "--until", until, "--out", out)
    assert done.returncode == 0, done.stderr
    assert str(out) in done.stdout
    verdicts = _latest_verdicts(record_run.db)
    assert set(verdicts) == set(CLOSED)
    holds = sum(1 for v in verdicts.values() if v == "hold")
    reviews = sum(1 for v in verdicts.values() if v == "review")
    assert (holds, reviews) == (2, 1)     # the scenario: A2 and B2 held, A3 (3 packs) for review
    assert f"{len(verdicts)} lots, {holds} holds, {reviews} reviews, {holds + reviews} open" in done.stdout
    assert not list(tmp_path.glob(".report.html.*"))      # no temporary file left beside it

    url = out.as_uri()
    console: list[str] = []
    errors: list[str] = []
    requests: list[str] = []
    with sync_playwright() as pw:
        browser = pw.chromium.launch(executable_path=_chromium(), headless=True,
                                     args=["--no-sandbox", "--disable-gpu"])
        try:
            page = browser.new_page(viewport={"width": 1200, "height": 900})

            def on_console(message: ConsoleMessage) -> None:
                if message.type in ("error", "warning"):
                    console.append(f"{message.type}: {message.text}")

            page.on("console", on_console)
            page.on("pageerror", lambda e: errors.append(str(e)))
            page.on("request", lambda r: requests.append(r.url))
            page.goto(url, wait_until="load")
            page.locator("section.product").last.locator("table.lots").wait_for(state="visible")
            assert console == [] and errors == []
            assert requests == [url]          # the file itself, nothing else

            for line, lot in CLOSED:
                row = page.locator(f"section.product[data-line='{line}'] table.lots tr[data-lot='{lot}']")
                assert row.is_visible(), lot
                badge = row.locator(".badge").inner_text().strip().lower()
                assert badge == verdicts[(line, lot)], lot
            for lot in ("Z1", "Z2"):          # still open, never decided
                assert page.locator(f"tr[data-lot='{lot}']").count() == 0
            held = page.locator("svg.means g.lot[data-verdict='hold']")
            assert held.count() == holds
            for i in range(holds):
                assert held.nth(i).locator("text.holdmark").text_content() == "HOLD"
            tiles = page.locator("main > div.tiles .tile b").all_inner_texts()
            assert tiles == [str(len(verdicts)), str(holds), str(reviews), str(holds + reviews)]
            # B2's head H3 was exported high: it is the one the head chart flags.
            l2 = page.locator("section.product[data-line='L2']")
            assert (l2.locator("svg.heads text.flag").text_content() or "").strip().endswith("H3")
            caution = page.locator("#caution").inner_text()
            assert "competent authority" in caution and "weights-and-measures law" in caution
            assert "Europe/Berlin" in page.locator("header.top").inner_text()

            shot = tmp_path / "report-example.png"
            page.screenshot(path=str(shot), full_page=False)
            (tmp_path / "report-full.png").write_bytes(page.screenshot(full_page=True))
            assert shot.stat().st_size > 10_000
            if os.environ.get("LOTWARDEN_SAVE_SCREENSHOT") == "1":
                SCREENSHOT_COPY.parent.mkdir(parents=True, exist_ok=True)
                shutil.copyfile(shot, SCREENSHOT_COPY)

            page.emulate_media(media="print")
            breaks = page.eval_on_selector_all(
                "section.product", "els => els.map(e => getComputedStyle(e).breakBefore)")
            assert breaks == ["auto", "page"]       # one product per printed page
        finally:
            browser.close()


def test_no_lots_in_the_period_is_still_a_page(record_run: RecordRun, tmp_path: Path) -> None:
    out = tmp_path / "empty.html"
    done = lotwarden("report", "--config", record_run.config, "--since", "2020-01-01", "--until", "2020-01-02",
                     "--out", out)
    assert done.returncode == 0, done.stderr
    text = out.read_text(encoding="utf-8")
    assert "No lot was decided in this period." in text
    assert "competent authority" in text
    assert "0 lots" in done.stdout


def test_the_title_names_the_plant_key_else_the_config_folder(record_run: RecordRun, tmp_path: Path) -> None:
    """Top-level `plant` names the page; without it the config file's folder does (a data value, escaped)."""
    out = tmp_path / "named.html"
    done = lotwarden("report", "--config", record_run.config, "--since", "2020-01-01", "--until", "2020-01-02",
                     "--out", out)
    assert done.returncode == 0, done.stderr
    assert f"<h1>Lot record · {record_run.config.parent.name}</h1>" in out.read_text(encoding="utf-8")
    named = record_run.root / "named.toml"
    named.write_text('plant = "Brackenfield <Foods> hall 2"\n' + record_run.config.read_text(encoding="utf-8"),
                     encoding="utf-8")
    done = lotwarden("report", "--config", named, "--since", "2020-01-01", "--until", "2020-01-02", "--out", out)
    assert done.returncode == 0, done.stderr
    assert "<h1>Lot record · Brackenfield &lt;Foods&gt; hall 2</h1>" in out.read_text(encoding="utf-8")


@pytest.mark.parametrize("args, needle", [
    (["--since", "2026-11-01", "--until", "2026-12-31", "--out", "/no/such/folder/r.html"], "--out"),
    (["--since", "2026-13-01", "--until", "2026-12-31", "--out", "{tmp}/r.html"], "--since"),
    (["--since", "2026-12-31", "--until", "2026-11-01", "--out", "{tmp}/r.html"], "--until"),
    (["--since", "2026-11-01", "--until", "2026-12-31", "--out", "{tmp}"], "--out"),
])
def test_bad_out_or_times_exit_2(record_run: RecordRun, tmp_path: Path, args: list[str], needle: str) -> None:
    done = lotwarden("report", "--config", record_run.config, *[a.format(tmp=tmp_path) for a in args])
    assert done.returncode == 2
    assert done.stderr.startswith("lotwarden: ") and needle in done.stderr
    assert "Traceback" not in done.stderr
    assert not list(tmp_path.iterdir())
