"""`lotwarden check` (not written yet)."""

from __future__ import annotations

import argparse


def register(sub: argparse._SubParsersAction) -> argparse.ArgumentParser:
    return sub.add_parser("check", help="(not written yet)")


def run(args: argparse.Namespace) -> int:
    print("lotwarden check: not written yet")
    return 2
