"""`lotwarden demo`: the Brackenfield Foods sample exports through the real daemon, told as a story."""

from __future__ import annotations

import argparse
from pathlib import Path


def register(sub: argparse._SubParsersAction) -> argparse.ArgumentParser:
    p = sub.add_parser(
        "demo", help="run the daemon on the sample exports in a temporary folder and print what happens",
        description="Copy the sample exports and rules shipped with lotwarden into a temporary folder, start "
                    "the daemon on it (alerts to a JSON-lines log and to an e-mail sink on 127.0.0.1), drop "
                    "the sample exports as a checkweigher would and print each event, then a table of lots and "
                    "verdicts. Needs no network. The tool screens; net-quantity compliance is decided under "
                    "local weights-and-measures law by the competent authority.")
    p.add_argument("--workdir", metavar="DIR", type=Path, default=None,
                   help="folder for the demo tree (default: a new temporary folder, kept afterwards)")
    return p


def run(args: argparse.Namespace) -> int:
    from monitor.daemon.demo import run_demo

    return run_demo(workdir=args.workdir)
