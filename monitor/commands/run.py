"""`lotwarden run`: the unattended daemon in the foreground (fit for systemd); SIGTERM stops, SIGHUP reloads."""

from __future__ import annotations

import argparse

DEFAULT_CONFIG = "config/lotwarden.toml"


def register(sub: argparse._SubParsersAction) -> argparse.ArgumentParser:
    p = sub.add_parser(
        "run", help="watch the drop folder and screen each lot as it closes (foreground daemon)",
        description="Watch the drop folder named in the config, take each finished export exactly once, "
                    "judge every closed lot by its rule and raise hold / review alerts. Logs one line per "
                    "event to stderr. SIGTERM or Ctrl-C: finish the file in hand and exit 0. SIGHUP, or any "
                    "change to the config or a rule file: reload (a bad edit keeps the last good version). "
                    "The tool screens; net-quantity compliance is decided under local weights-and-measures "
                    "law by the competent authority.")
    p.add_argument("--config", default=DEFAULT_CONFIG, metavar="PATH",
                   help=f"daemon config file (default: {DEFAULT_CONFIG})")
    return p


def run(args: argparse.Namespace) -> int:
    from monitor.daemon.service import Daemon

    return Daemon(args.config).run()
