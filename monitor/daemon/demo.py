"""The self-contained demo: a temp plant folder, the real daemon in a thread, weigher-style drops, a story.

Everything runs on this machine: the sample exports of the (invented) Brackenfield Foods plant are copied
into a temporary tree, the daemon watches it with settle time 0.5 s, alerts go to a JSON-lines log and to an
SMTP sink on 127.0.0.1 that prints each message it receives. Nothing leaves the machine.
"""

from __future__ import annotations

import json
import os
import shutil
import socket
import sqlite3
import sys
import tempfile
import threading
import time
import tomllib
from collections.abc import Callable
from dataclasses import dataclass, field
from email.message import EmailMessage
from pathlib import Path
from typing import Any, TextIO

from monitor.daemon.intake import FileOutcome
from monitor.daemon.service import Daemon
from monitor.keys import PROFILE, path_keys
from monitor.lot import Verdict
from monitor.polling import wait_until
from monitor.resources import demo_feeds_dir, demo_rules_dir, require_dir, sample_config_path
from monitor.state import database, outbox, verdicts

SETTLE_SECONDS = 0.5
START_SECONDS = 60.0   # a first start after install compiles and imports numpy, scipy, pandas, matplotlib
DISCLAIMER = ("The tool screens; net-quantity compliance is decided under local weights-and-measures law by "
              "the competent authority.")


# --------------------------------------------------------------------------------------------- finding inputs
def find_inputs(start: Path | None = None) -> tuple[Path, Path, Path | None]:
    """(sample_feeds, rules, sample config or None): the ones shipped with lotwarden (``monitor.resources``),
    or those under ``start`` when given (a folder holding ``sample_feeds/``, ``rules/`` and optionally
    ``config/lotwarden.toml``)."""
    if start is None:
        feeds, rules, cfg = demo_feeds_dir(), demo_rules_dir(), sample_config_path()
    else:
        feeds, rules, cfg = start / "sample_feeds", start / "rules", start / "config" / "lotwarden.toml"
    require_dir(feeds, "sample_feeds")
    require_dir(rules, "rules")
    return feeds, rules, (cfg if cfg.is_file() else None)


def free_loopback_port() -> int:
    """A free TCP port on 127.0.0.1 (bind to port 0, read it, close: aiosmtpd's Controller needs a number)."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


# --------------------------------------------------------------------------------------------- demo config
def toml_value(v: Any) -> str:
    """A TOML literal for the simple values profile tables hold."""
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, (int, float)):
        return repr(v)
    if isinstance(v, str):
        return json.dumps(v, ensure_ascii=False)
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(toml_value(x) for x in v) + "]"
    if isinstance(v, dict):
        return "{ " + ", ".join(f"{json.dumps(str(k))} = {toml_value(x)}" for k, x in v.items()) + " }"
    raise ValueError(f"cannot write {v!r} as TOML")


# the profile keys declared as paths (monitor.keys): made absolute when the profiles move to the temp tree
PROFILE_PATH_KEYS = frozenset(k.name for section, k in path_keys() if section is PROFILE)


def profile_tables(repo_config: Path | None) -> dict[str, dict[str, Any]]:
    """The `[profiles.*]` tables of the repo config, path-like values made absolute for the temp tree."""
    if repo_config is None:
        return {}
    table = tomllib.loads(repo_config.read_text(encoding="utf-8-sig"))
    out: dict[str, dict[str, Any]] = {}
    for name, sub in (table.get("profiles") or {}).items():
        fixed = dict(sub)
        for k, v in sub.items():
            if isinstance(v, str) and k in PROFILE_PATH_KEYS and not Path(v).is_absolute():
                fixed[k] = str((repo_config.parent / v).resolve())
        out[name] = fixed
    return out


def write_demo_config(root: Path, profiles: dict[str, dict[str, Any]], smtp_port: int | None) -> Path:
    """Write ``root/lotwarden.toml`` for the demo tree; return its path."""
    lines = [
        "# lotwarden demo config (written by `lotwarden demo`; everything stays on this machine)",
        'rules_dir = "rules"', "",
        "[watch]", 'folder = "drop"', f"settle_seconds = {SETTLE_SECONDS}", "polling = false",
        "rescan_seconds = 5", "",
        "[state]", 'folder = "state"', "",
        "[alerts]", "drain_seconds = 0.5", "",
        "[alerts.log]", 'path = "state/alerts.jsonl"', "",
    ]
    if smtp_port is not None:
        lines += ["[alerts.email]", 'host = "127.0.0.1"', f"port = {smtp_port}", 'security = "none"',
                  'sender = "lotwarden-demo@brackenfield.example"',
                  'recipients = ["qa-lines@brackenfield.example"]', ""]
    for name, table in profiles.items():
        lines.append(f"[profiles.{json.dumps(name)}]")
        lines += [f"{k} = {toml_value(v)}" for k, v in table.items()]
        lines.append("")
    cfg = root / "lotwarden.toml"
    cfg.write_text("\n".join(lines), encoding="utf-8")
    return cfg


# --------------------------------------------------------------------------------------------- SMTP sink
class PrintingSink:
    """aiosmtpd handler printing From / To / Subject and the first body lines of each message, and saving
    it in ``save_dir`` (when given) as ``email-NN.eml`` with its HTML part (``email-NN.html``, charts linked
    to the saved ``email-NN-chart-K.png`` files)."""

    def __init__(self, say: Callable[[str], None], body_lines: int = 4, save_dir: Path | None = None) -> None:
        self.say = say
        self.body_lines = body_lines
        self.save_dir = save_dir
        self.count = 0
        self.saved: list[Path] = []

    async def handle_DATA(self, server: Any, session: Any, envelope: Any) -> str:  # aiosmtpd's hook name
        from email import message_from_bytes
        from email.policy import default

        raw: bytes = envelope.original_content or envelope.content
        msg = message_from_bytes(raw, policy=default)
        self.count += 1
        body = msg.get_body(preferencelist=("plain",))
        text = body.get_content() if body is not None else ""
        first = [ln for ln in text.splitlines() if ln.strip()][: self.body_lines]
        self.say(f"  e-mail #{self.count}  From: {msg['From']}  To: {msg['To']}")
        self.say(f"            Subject: {msg['Subject']}")
        for ln in first:
            self.say(f"            | {ln}")
        if self.save_dir is not None:
            try:
                names = save_message(raw, msg, self.save_dir, f"email-{self.count:02d}")
            except OSError as exc:
                self.say(f"            !! could not save this e-mail in {self.save_dir}: {exc}")
            else:
                self.saved.extend(names)
                self.say(f"            saved: {', '.join(p.name for p in names)}")
        return "250 OK"


def save_message(raw: bytes, msg: EmailMessage, folder: Path, stem: str) -> list[Path]:
    """Write ``raw`` as ``stem.eml``, its HTML part as ``stem.html`` and its PNG parts as ``stem-chart-K.png``
    in ``folder`` (names made here, never from message data); the HTML's ``cid:`` links point at the PNGs."""
    folder.mkdir(parents=True, exist_ok=True)
    out = [folder / f"{stem}.eml"]
    out[0].write_bytes(raw)
    links: dict[str, str] = {}
    for k, part in enumerate((p for p in msg.walk() if p.get_content_type() == "image/png"), start=1):
        png = folder / f"{stem}-chart-{k}.png"
        png.write_bytes(part.get_content())
        out.append(png)
        cid = str(part.get("Content-ID", "")).strip().strip("<>")
        if cid:
            links[f"cid:{cid}"] = png.name
    html_part = msg.get_body(preferencelist=("html",))
    if html_part is not None:
        html = html_part.get_content()
        for cid, name in links.items():
            html = html.replace(cid, name)
        page = folder / f"{stem}.html"
        page.write_text(html, encoding="utf-8")
        out.insert(1, page)
    return out


# --------------------------------------------------------------------------------------------- the story
@dataclass
class Story:
    """Prints the demo's events one line each, thread-safely."""

    out: TextIO
    t0: float = field(default_factory=time.monotonic)
    lock: threading.Lock = field(default_factory=threading.Lock)

    def say(self, text: str) -> None:
        with self.lock:
            print(f"[{time.monotonic() - self.t0:5.1f}s] {text}", file=self.out, flush=True)

    def on_event(self, kind: str, details: dict[str, object]) -> None:
        if kind == "file-finished":
            self.say(f"file finished, taken: {Path(str(details['path'])).name}")
        elif kind == "file-processed":
            self.say(f"  -> {describe_outcome(details.get('outcome'))}")
        elif kind == "lots-closed":
            self.say(f"  -> lots closed: {describe_outcome(details.get('result'))}")
        elif kind == "config-rejected":
            self.say(f"config rejected: {details.get('error')}")


def describe_outcome(outcome: object) -> str:
    """A short text for an intake outcome (one file) or for the verdicts of closed lots (a list)."""
    if outcome is None:
        return "nothing"
    if isinstance(outcome, (list, tuple)):
        return f"{len(outcome)} {'lot' if len(outcome) == 1 else 'lots'}" + "".join(
            f"\n             {describe_verdict(o) if isinstance(o, Verdict) else describe_outcome(o)}"
            for o in outcome)
    if isinstance(outcome, FileOutcome):
        return outcome.describe()
    return str(outcome)


def describe_verdict(v: Verdict) -> str:
    where = f"{v.key.line}/{v.key.product}/{v.key.lot}"
    mean_s = "-" if v.mean is None else f"{v.mean:.2f}"
    return f"verdict {v.verdict} for {where} (n {v.n}, mean {mean_s})"


class AlertFollower:
    """Prints new lines of the JSON-lines alert log."""

    def __init__(self, path: Path, story: Story) -> None:
        self.path, self.story, self.offset = path, story, 0

    def poll(self) -> int:
        try:
            with open(self.path, "rb") as fh:
                fh.seek(self.offset)
                data = fh.read()
        except FileNotFoundError:
            return 0
        end = data.rfind(b"\n") + 1
        self.offset += end
        count = 0
        for raw in data[:end].splitlines():
            try:
                a = json.loads(raw)
            except ValueError:
                continue
            count += 1
            where = "/".join(x for x in (a.get("line"), a.get("product"), a.get("lot")) if x)
            extra = a.get("data", {}).get("reason") or a.get("data", {}).get("message") or ""
            text = " ".join(x for x in (str(a.get("kind")), where, str(extra)) if x)
            self.story.say(f"alert logged: {text}")
        return count


# --------------------------------------------------------------------------------------------- dropping files
def drop_in_pieces(src: Path, dest: Path, pieces: int = 3, pause: float = 0.2) -> None:
    """Write ``src`` to ``dest`` in chunks with pauses, as a weigher streaming its export."""
    data = src.read_bytes()
    step = max(1, len(data) // pieces + 1)
    with open(dest, "wb") as fh:
        for i in range(0, len(data), step):
            fh.write(data[i:i + step])
            fh.flush()
            time.sleep(pause)


def drop_by_rename(src: Path, dest: Path) -> None:
    """Write ``src`` under a temporary name, then rename it into place in one step."""
    tmp = dest.with_name(dest.name + ".part")
    shutil.copyfile(src, tmp)
    os.replace(tmp, dest)




def pending_deliveries(db: Path, channel: str) -> int:
    """Deliveries still pending on ``channel`` (e-mail may wait for its grouping window; see the stop)."""
    try:
        with database.read_only(db) as conn:
            return outbox.delivery_counts(conn).get((channel, "pending"), 0)
    except sqlite3.Error:
        return 0


def summary_rows(db: Path) -> list[verdicts.ListedVerdict]:
    with database.read_only(db) as conn:
        return verdicts.listing(conn)


def print_summary(rows: list[verdicts.ListedVerdict], say: Callable[[str], None]) -> None:
    say("")
    say("Lots and verdicts")
    head = f"{'line':<5} {'product':<10} {'lot':<12} {'n':>5} {'mean':>10} {'target':>8} {'unit':<4} verdict  reason"
    say(head)
    say("-" * len(head))
    for line, product, lot, n, mean, target, unit, verdict, payload in rows:
        try:
            reason = json.loads(payload).get("reason", "")
        except ValueError:
            reason = ""
        mean_s = "-" if mean is None else f"{mean:.2f}"
        tgt_s = "-" if target is None else f"{target:g}"
        say(f"{line:<5} {product:<10} {lot:<12} {n:>5} {mean_s:>10} {tgt_s:>8} {unit:<4} {verdict:<8} "
            f"{reason}")
    say(DISCLAIMER)


# --------------------------------------------------------------------------------------------- main
def run_demo(out: TextIO | None = None, *, workdir: Path | None = None, start: Path | None = None,
             timeout: float = 25.0) -> int:
    """Run the whole demo; return 0 when every sample file was taken and the outbox drained."""
    out = out or sys.stdout
    story = Story(out)
    feeds, rules, repo_cfg = find_inputs(start)
    root = Path(workdir) if workdir else Path(tempfile.mkdtemp(prefix="lotwarden-demo-"))
    (root / "drop").mkdir(parents=True, exist_ok=True)
    shutil.copytree(rules, root / "rules", dirs_exist_ok=True)
    incoming = root / "weigher-outbox"
    shutil.copytree(feeds, incoming, dirs_exist_ok=True)
    samples = sorted(p for p in incoming.iterdir() if p.is_file() and not p.name.startswith("."))

    from aiosmtpd.controller import Controller

    mail_dir = root / "e-mails"
    sink = PrintingSink(story.say, save_dir=mail_dir)
    smtp_port = free_loopback_port()
    controller = Controller(sink, hostname="127.0.0.1", port=smtp_port)
    controller.start()
    cfg = write_demo_config(root, profile_tables(repo_cfg), smtp_port)
    story.say(f"demo plant folder: {root}")
    story.say(f"sample exports and rules from: {feeds.parent}")
    story.say(f"config: {cfg.name}; {len(list((root / 'rules').glob('*.toml')))} rule files; "
              f"{len(samples)} sample exports; alerts -> state/alerts.jsonl"
              + f" and e-mail via 127.0.0.1:{smtp_port}")

    with open(root / "state-daemon.log", "a", encoding="utf-8") as log_file:
        daemon = Daemon(cfg, on_event=story.on_event, log_stream=log_file)
        result: dict[str, int] = {}
        th = threading.Thread(target=lambda: result.setdefault("rc", daemon.run()), name="lotwarden-demo-daemon")
        th.start()
        follower = AlertFollower(root / "state" / "alerts.jsonl", story)
        ok = True

        def taken_after(count: int) -> Callable[[], bool]:
            return lambda: daemon.files_done > count

        try:
            if not wait_until(lambda: daemon.ready.is_set() or not th.is_alive(), START_SECONDS):
                story.say("daemon did not start; see state-daemon.log")
                return 2
            if not th.is_alive():
                story.say(f"daemon stopped at start-up (exit {result.get('rc')}); see state-daemon.log")
                return 2
            deadline = time.monotonic() + timeout
            for i, src in enumerate(samples):
                dest = root / "drop" / src.name
                mode = i % 3
                before = daemon.files_done
                if mode == 0:
                    story.say(f"weigher writes {src.name} in pieces")
                    drop_in_pieces(src, dest)
                elif mode == 1:
                    story.say(f"weigher writes {src.name}.part and renames it")
                    drop_by_rename(src, dest)
                else:
                    story.say(f"weigher copies {src.name}")
                    shutil.copyfile(src, dest)
                left = max(1.0, deadline - time.monotonic())
                if not wait_until(taken_after(before), min(8.0, left)):
                    story.say(f"  !! {src.name} not taken in time")
                    ok = False
                follower.poll()
            if samples:
                again = samples[0]
                before = daemon.files_done
                story.say(f"weigher sends {again.name} a second time (same content, new name)")
                drop_by_rename(again, root / "drop" / f"resent-{again.name}")
                if not wait_until(taken_after(before), 8.0):
                    story.say("  !! the re-sent file was not taken in time")
                    ok = False
                follower.poll()
            story.say("end of shift: closing every open lot")
            fut = daemon.call_soon(lambda d: d.close_all_lots())
            fut.result(timeout=15)
            db = root / "state" / "lotwarden.db"
            if not wait_until(lambda: pending_deliveries(db, "log") == 0, 10, 0.1):
                story.say("  !! some alerts were still waiting for the alert log")
                ok = False
            follower.poll()
            story.say("stopping the daemon (it sends what the e-mail channel still groups)")
            daemon.stop()
            th.join(15)
            if pending_deliveries(db, "email"):
                story.say("  !! some e-mails were not delivered")
                ok = False
            wait_until(lambda: sink.count > 0, 3)   # the sink prints from its own thread
            print_summary(summary_rows(db), story.say)
        finally:
            daemon.stop()
            th.join(15)
            controller.stop()
    if sink.saved:
        story.say(f"e-mails received are saved in {mail_dir} (.eml, the HTML part and the chart PNGs)")
    story.say(f"done: {daemon.files_done} {'file' if daemon.files_done == 1 else 'files'} taken, {sink.count} "
              f"{'e-mail' if sink.count == 1 else 'e-mails'} received; files are in {root}")
    return 0 if ok and result.get("rc") == 0 else 1
