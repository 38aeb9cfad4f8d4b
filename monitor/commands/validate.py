"""`lotwarden validate`: check the daemon config and its rule files without running; exit 0 or 2."""

from __future__ import annotations

import argparse
from pathlib import Path
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from monitor.rulebook import DriftRule

DEFAULT_CONFIG = "config/lotwarden.toml"


def register(sub: argparse._SubParsersAction) -> argparse.ArgumentParser:
    p = sub.add_parser(
        "validate", help="check the config and rule files without running (exit 0 ok, 2 with the problem)",
        description="Load the daemon config, its alert channels, operator templates, feed profiles and "
                    "every rule file exactly as `lotwarden run` would, print what was checked, and exit 0; "
                    "on the first problem print it with file and key and exit 2.")
    p.add_argument("--config", default=DEFAULT_CONFIG, metavar="PATH",
                   help=f"daemon config file (default: {DEFAULT_CONFIG})")
    return p


def run(args: argparse.Namespace) -> int:
    from monitor.daemon.config import load_config
    from monitor.rulebook import load_rules

    config = load_config(args.config)       # ConfigError → one line and exit 2 (monitor/cli.py)
    rules = load_rules(config.rules_dir)    # RuleError → the same
    watch = config.watch
    print(f"config {args.config}: ok (version {config.version})")
    print(f"  rules: {len(rules)} in {config.rules_dir}")
    for r in rules:
        print(f"    {r.name} @ {r.version}: products {', '.join(r.products)}; target {r.target:g} {r.unit}, "
              f"{r.alternative}, alpha {r.alpha:g}, min n {r.min_n}, idle {r.idle_minutes:g} min"
              + (f"; release on equivalence ±{r.margin:g} {r.unit}" if r.release == "equivalence" and r.margin else "")
              + (_drift_text(r.drift) if r.drift is not None else ""))
    names = [p.name for p in config.profiles]
    print(f"  profiles: {len(config.profiles)}" + (f" ({', '.join(names)})" if names else ""))
    channels = config.alerts.channels
    print(f"  alert channels: {', '.join(channels) if channels else 'none (alerts stay in the outbox)'}")
    templates = config.alerts.templates
    if templates is not None:
        from monitor.alerts.templates import TemplateSet

        TemplateSet.check(templates)        # TemplateError (file, line) → exit 2
        print(f"  operator templates: {templates}: ok (checked against sample alerts)")
    mode = f"polling every {watch.poll_interval:g}s" if watch.polling else "native events"
    exists = "" if Path(watch.folder).is_dir() else " (does not exist yet; run creates it)"
    print(f"  watch: {watch.folder}{exists}; {mode}; settle {watch.settle_seconds:g}s; "
          f"rescan every {watch.rescan_seconds:g}s")
    print(f"  state: {config.state.folder}; archive {config.state.archive}; quarantine {config.state.quarantine}")
    if not rules:
        print("  warning: no rule files — every closed lot will raise a review alert")
    return 0


def _drift_text(d: DriftRule) -> str:
    how = f"k {d.k:g}, h {d.h:g}" if d.method == "cusum" else f"lambda {d.lam:g}, L {d.L:g}"
    return f"; drift {d.method} ({how}{', per head too' if d.heads else ''})"
