"""`lotwarden lots` (placeholder until its owner writes it; replace this whole file)."""

from __future__ import annotations

import argparse


def register(sub: argparse._SubParsersAction) -> argparse.ArgumentParser:
    return sub.add_parser("lots", help="(being built)")


def run(args: argparse.Namespace) -> int:
    raise SystemExit("lotwarden: lots is being built")
