"""`lotwarden validate` (not written yet)."""

from __future__ import annotations

import argparse


def register(sub: argparse._SubParsersAction) -> argparse.ArgumentParser:
    return sub.add_parser("validate", help="(not written yet)")


def run(args: argparse.Namespace) -> int:
    print("lotwarden validate: not written yet")
    return 2
