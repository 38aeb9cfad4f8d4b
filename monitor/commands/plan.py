"""`lotwarden plan`: the lot size that detects a given mean shift with a given power (noncentral t)."""

from __future__ import annotations

import argparse
import json
import math
import sys

from monitor.errors import ConfigError
from monitor.rulebook import ALTERNATIVES


def register(sub: argparse._SubParsersAction) -> argparse.ArgumentParser:
    p = sub.add_parser(
        "plan", help="lot size needed to detect a shift",
        description="Smallest number of units per lot for which the one-sample t-test (z-test with "
        "--known-sd) at alpha detects a mean shift of --shift with at least --power, given the process sd.")
    p.add_argument("--sd", type=float, required=True, help="process standard deviation (unit of --shift)")
    p.add_argument("--shift", type=float, required=True, help="mean shift to detect (> 0)")
    p.add_argument("--alpha", type=float, default=0.05, help="significance level in (0, 0.5] (default 0.05)")
    p.add_argument("--power", type=float, default=0.8, help="power to reach, in (0, 1) (default 0.8)")
    p.add_argument("--alternative", choices=ALTERNATIVES, default="two-sided")
    p.add_argument("--known-sd", action="store_true", dest="known_sd",
                   help="the sd is known (z-test) rather than estimated from each lot (t-test)")
    p.add_argument("--format", choices=("table", "json"), default="table")
    return p


def _check(args: argparse.Namespace) -> None:
    def bad(flag: str, value: float, allowed: str) -> ConfigError:
        return ConfigError(f"{flag} {value:g} — must be {allowed}", key="plan")

    for flag, v in (("--sd", args.sd), ("--shift", args.shift)):
        if not (math.isfinite(v) and v > 0):
            raise bad(flag, v, "a number > 0")
    if not (0 < args.alpha <= 0.5):
        raise bad("--alpha", args.alpha, "in (0, 0.5]")
    if not (0 < args.power < 1):
        raise bad("--power", args.power, "in (0, 1)")


def run(args: argparse.Namespace) -> int:
    from monitor.stats.power import plan_sample_size, power_curve

    _check(args)
    try:
        n = plan_sample_size(args.sd, args.shift, args.alpha, args.power, args.alternative,
                             known_sd=args.known_sd)
    except ValueError as exc:   # the search found no lot size (more than MAX_PLAN_N units would be needed)
        raise ConfigError(f"no lot size reaches power {args.power:g}: {exc}", key="plan",
                          hint="detect a larger --shift, or accept a lower --power or a larger --alpha") from None
    around = sorted({max(2, k) for k in (n - 10, n - 5, n - 2, n - 1, n, n + 1, n + 2, n + 5, n + 10,
                                          2 * n, max(2, n // 2))})
    curve = power_curve(args.sd, args.shift, args.alpha, args.alternative, around, known_sd=args.known_sd)
    achieved = dict(curve)[n]
    if args.format == "json":
        json.dump({"n": n, "achieved_power": achieved, "sd": args.sd, "shift": args.shift, "alpha": args.alpha,
                   "power": args.power, "alternative": args.alternative,
                   "test": "z" if args.known_sd else "t",
                   "effect_size": args.shift / args.sd,
                   "table": [{"n": k, "power": p} for k, p in curve]}, sys.stdout, indent=2)
        sys.stdout.write("\n")
        return 0
    test = "z-test" if args.known_sd else "t-test"
    print(f"{test}, {args.alternative}, alpha {args.alpha:g}: detect a shift of {args.shift:g} "
          f"(sd {args.sd:g}, effect size {args.shift / args.sd:.3g}) with power >= {args.power:g}")
    print(f"=> at least n = {n} units per lot (power {achieved:.4f})\n")
    print("      n   power")
    for k, p in curve:
        print(f"{k:7d}   {p:.4f}" + ("   <- smallest n" if k == n else ""))
    return 0
