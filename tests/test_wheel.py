"""The release installs anywhere: a wheel built from the repo, in a fresh venv outside the checkout, runs every command.

One wheel and one virtual environment (no editable install, no system site-packages) are made for the whole
module; every command runs with its working folder in a temporary folder outside the checkout, so nothing
can be found there by accident. Installing the wheel's dependencies needs the package index (pip's cache
makes it quick); when the index cannot be reached the test fails, it does not skip.
"""

from __future__ import annotations

import csv
import json
import os
import signal
import subprocess
import sys
import threading
import time
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import pytest

from monitor.polling import wait_until

REPO = Path(__file__).resolve().parent.parent


@dataclass(frozen=True)
class Venv:
    root: Path
    python: Path
    lotwarden: Path
    wheel: Path
    cwd: Path                 # a working folder outside the checkout
    env: dict[str, str]
    shipped: dict[str, Path]  # what monitor.resources reports inside the venv

    def run(self, *args: str, timeout: float = 120) -> subprocess.CompletedProcess[str]:
        return subprocess.run([str(self.lotwarden), *args], cwd=self.cwd, env=self.env, capture_output=True,
                              text=True, timeout=timeout, check=False)


def _must(proc: subprocess.CompletedProcess[str], what: str) -> None:
    if proc.returncode != 0:
        pytest.fail(f"{what} failed (exit {proc.returncode}):\n{proc.stdout[-4000:]}\n{proc.stderr[-4000:]}")


@pytest.fixture(scope="module")
def venv(tmp_path_factory: pytest.TempPathFactory) -> Venv:
    base = tmp_path_factory.mktemp("wheel")
    assert not base.resolve().is_relative_to(REPO.resolve())
    dist = base / "dist"
    _must(subprocess.run([sys.executable, "-m", "pip", "wheel", "--no-deps", "-q", "-w", str(dist), "."],
                         cwd=REPO, capture_output=True, text=True, timeout=300, check=False), "building the wheel")
    wheels = sorted(dist.glob("lotwarden-*.whl"))
    assert len(wheels) == 1, wheels
    root = base / "venv"
    # no pip inside the venv (the test's own pip installs into it with --python): saves seconds
    _must(subprocess.run([sys.executable, "-m", "venv", "--without-pip", str(root)], capture_output=True,
                         text=True, timeout=300, check=False), "making the venv")
    env = {k: v for k, v in os.environ.items() if k not in ("PYTHONPATH", "PYTHONHOME", "VIRTUAL_ENV")}
    env["PATH"] = f"{root / 'bin'}{os.pathsep}{env.get('PATH', '')}"
    cwd = base / "elsewhere"
    cwd.mkdir()
    python = root / "bin" / "python"
    # the wheel and its dependencies from the index (a failure here fails the test: no skip)
    _must(subprocess.run([sys.executable, "-m", "pip", "--python", str(python), "install", "-q",
                          str(wheels[0])], cwd=cwd, env=env, capture_output=True, text=True, timeout=900,
                         check=False), "installing the wheel")
    probe = subprocess.run(
        [str(python), "-c", "import json, monitor, monitor.resources as r; print(json.dumps({"
         "'monitor': monitor.__file__, 'templates': str(r.shipped_templates_dir()), "
         "'feeds': str(r.demo_feeds_dir()), 'rules': str(r.demo_rules_dir()), "
         "'config': str(r.sample_config_path())}))"],
        cwd=cwd, env=env, capture_output=True, text=True, timeout=60, check=False)
    _must(probe, "importing monitor in the venv")
    shipped = {k: Path(v) for k, v in json.loads(probe.stdout).items()}
    return Venv(root, python, root / "bin" / "lotwarden", wheels[0], cwd, env, shipped)


def _site_packages(v: Venv) -> Path:
    return next((v.root / "lib").glob("python3.*/site-packages"))


def test_monitor_and_its_shipped_files_come_from_the_venv(venv: Venv) -> None:
    """`import monitor` finds the installed wheel, and every shipped folder is inside it, none in the checkout."""
    site = _site_packages(venv).resolve()
    for name, path in venv.shipped.items():
        assert path.resolve().is_relative_to(site), (name, path)
        assert not path.resolve().is_relative_to(REPO.resolve()), (name, path)
        assert path.exists(), (name, path)
    # the wheel carries the checkout's shipped files, each one byte for byte
    pairs = [(REPO / "config" / "templates", venv.shipped["templates"]), (REPO / "sample_feeds", venv.shipped["feeds"]),
             (REPO / "rules", venv.shipped["rules"])]
    for src, dst in pairs:
        names = sorted(p.name for p in src.iterdir() if p.is_file())
        assert names and names == sorted(p.name for p in dst.iterdir() if p.is_file()), src
        for name in names:
            assert (src / name).read_bytes() == (dst / name).read_bytes(), name
    assert (REPO / "config" / "lotwarden.toml").read_bytes() == venv.shipped["config"].read_bytes()


def test_version_is_the_installed_distributions(venv: Venv) -> None:
    """`lotwarden --version` prints the version pip recorded for the installed distribution (one source)."""
    res = venv.run("--version")
    _must(res, "lotwarden --version")
    meta = subprocess.run([str(venv.python), "-c", "import importlib.metadata as m; print(m.version('lotwarden'))"],
                          cwd=venv.cwd, env=venv.env, capture_output=True, text=True, timeout=60, check=False)
    _must(meta, "reading the distribution's metadata")
    version = meta.stdout.strip()
    assert res.stdout.strip() == f"lotwarden {version}"
    assert venv.wheel.name.startswith(f"lotwarden-{version}-")
    assert f"## [{version}]" in (REPO / "CHANGELOG.md").read_text(encoding="utf-8")
    as_module = subprocess.run([str(venv.python), "-m", "monitor", "--version"], cwd=venv.cwd, env=venv.env,
                               capture_output=True, text=True, timeout=60, check=False)
    _must(as_module, "python -m monitor --version")
    assert as_module.stdout.strip() == f"lotwarden {version}"


def test_demo_runs_from_the_wheel_and_holds_lots(venv: Venv) -> None:
    """`lotwarden demo` from the venv takes every shipped sample export, e-mails with the shipped templates
    and prints held lots in its table."""
    work = venv.cwd / "demo"
    res = venv.run("demo", "--workdir", str(work))
    out = res.stdout
    assert res.returncode == 0, out + res.stderr
    assert f"sample exports and rules from: {venv.shipped['feeds'].parent}" in out
    for name in sorted(p.name for p in (REPO / "sample_feeds").iterdir() if p.is_file()):
        assert f"file finished, taken: {name}" in out
    table = out[out.index("Lots and verdicts"):].splitlines()
    held = [ln for ln in table if " hold " in ln]
    assert held, out
    assert "e-mail #1" in out and "!!" not in out
    assert "alert delivery not started" not in (work / "state-daemon.log").read_text(encoding="utf-8")


def test_check_judges_a_shipped_feed(venv: Venv) -> None:
    """`lotwarden check FEED` from the venv: every lot in the file (read here with the csv module) judged."""
    feed = venv.shipped["feeds"] / "L1-oat-20261130-0600.csv"
    with open(feed, newline="", encoding="utf-8") as fh:
        lots = {row["lot"] for row in csv.DictReader(fh)}
    res = venv.run("check", str(feed), "--rules", str(venv.shipped["rules"]), "--config",
                   str(venv.shipped["config"]), "--format", "json")
    assert res.returncode in (0, 1), res.stderr
    data = json.loads(res.stdout)
    rows = data["lots"] if isinstance(data, dict) else data
    assert {r["lot"] for r in rows} == lots
    assert all(r["verdict"] in ("pass", "hold", "review") for r in rows)


def test_validate_checks_the_shipped_config(venv: Venv) -> None:
    """`lotwarden validate --config` on the shipped sample config: ok, with every shipped rule file found."""
    res = venv.run("validate", "--config", str(venv.shipped["config"]))
    assert res.returncode == 0, res.stdout + res.stderr
    assert "ok" in res.stdout.splitlines()[0]
    n_rules = len(list((REPO / "rules").glob("*.toml")))
    assert f"rules: {n_rules} in " in res.stdout


class _Sink:
    """aiosmtpd handler keeping each message's Subject."""

    def __init__(self) -> None:
        self.subjects: list[str] = []
        self.lock = threading.Lock()

    async def handle_DATA(self, server: object, session: object, envelope: object) -> str:  # aiosmtpd's hook
        from email import message_from_bytes
        from email.policy import default

        msg = message_from_bytes(envelope.original_content or envelope.content, policy=default)  # type: ignore[attr-defined]
        with self.lock:
            self.subjects.append(str(msg["Subject"]))
        return "250 OK"


@pytest.fixture
def smtp_sink() -> Iterator[tuple[_Sink, int]]:
    import socket

    from aiosmtpd.controller import Controller

    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = int(s.getsockname()[1])
    sink = _Sink()
    ctl = Controller(sink, hostname="127.0.0.1", port=port)
    ctl.start()
    try:
        yield sink, port
    finally:
        ctl.stop()


def test_run_starts_with_the_shipped_templates_and_stops_on_sigterm(venv: Venv, smtp_sink: tuple[_Sink, int]) -> None:
    """`lotwarden run` from the venv on a tmp drop folder: starts, takes a file, e-mails the start notice
    rendered from the shipped templates, and exits 0 on SIGTERM."""
    sink, port = smtp_sink
    plant = venv.cwd / "plant"
    (plant / "drop").mkdir(parents=True)
    cfg = plant / "lotwarden.toml"
    cfg.write_text("\n".join([
        f"rules_dir = {json.dumps(str(venv.shipped['rules']))}",
        "[watch]", 'folder = "drop"', "settle_seconds = 0.2", "rescan_seconds = 1",
        "[state]", 'folder = "state"',
        "[alerts]", "drain_seconds = 0.2", "group_window_seconds = 0",
        "[alerts.log]", 'path = "state/alerts.jsonl"',
        "[alerts.email]", 'host = "127.0.0.1"', f"port = {port}", 'security = "none"',
        'sender = "lotwarden@plant.example"', 'recipients = ["qa@plant.example"]', ""]), encoding="utf-8")
    log = plant / "daemon.log"
    with open(log, "wb") as fh:
        proc = subprocess.Popen([str(venv.lotwarden), "run", "--config", str(cfg)], cwd=venv.cwd, env=venv.env,
                                stdout=subprocess.DEVNULL, stderr=fh)

    def text() -> str:
        return log.read_text(encoding="utf-8", errors="replace")

    started = (REPO / "config" / "templates" / "daemon-started.subject.txt").read_text(encoding="utf-8").strip()
    try:
        assert wait_until(lambda: " started:" in text() or proc.poll() is not None, 60), text()
        assert proc.poll() is None, text()
        feed = venv.shipped["feeds"] / "L1-oat-20261130-0600.csv"
        tmp = plant / "incoming.part"
        tmp.write_bytes(feed.read_bytes())
        os.replace(tmp, plant / "drop" / feed.name)
        assert wait_until(lambda: f"taken {feed.name}" in text(), 30), text()
        assert wait_until(lambda: started in sink.subjects, 20), (sink.subjects, text())
        t0 = time.monotonic()
        proc.send_signal(signal.SIGTERM)
        rc = proc.wait(15)
        took = time.monotonic() - t0
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait(10)
    assert rc == 0, text()
    assert took < 10.0
    lines = text().splitlines()
    assert lines and lines[-1].endswith("stopped"), lines[-3:]
    assert not [ln for ln in lines if " ERROR " in ln], text()
    for failure in ("alert delivery not started", "template folder does not exist", "templates refused",
                    "alert dispatcher not installed"):
        assert failure not in text(), text()
