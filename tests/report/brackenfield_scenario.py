"""The invented demo report: Brackenfield Foods, line L1 oat flakes 500 g and line L2 porridge oats 1 kg."""

from __future__ import annotations

from datetime import datetime, timedelta, timezone

from monitor.giveaway import giveaway_of
from monitor.report.model import Disposition, HeadOffset, LotRow, ProductSection, Report, RuleText

TZ = timezone(timedelta(hours=1))
START = datetime(2026, 11, 30, 6, 0, tzinfo=TZ)

OAT_RULE = """name = "oat-flakes-500"
version = "3"
products = ["oat flakes 500 g"]
unit = "g"
target = 502.0
nominal = 500.0
alternative = "less"
alpha = 0.01
cost_per_unit = 0.0042
currency = "EUR"
"""

PORRIDGE_RULE = """name = "porridge-1kg"
version = "1"
products = ["porridge oats 1 kg"]
unit = "g"
target = 1004.0
alternative = "two-sided"
alpha = 0.05
"""

# Head H4 drifts down lot by lot (−0.2 g → −7.2 g); the other heads wander within ±0.8 g.
_BASE_OFFSETS = {"H1": 0.4, "H2": -0.3, "H3": 0.7, "H5": -0.5, "H6": 0.2}
_OAT_LOTS = [
    # code, mean, ci_low, ci_high, p, verdict
    ("L1-2611-01", 502.31, None, 503.32, 0.81, "pass"),
    ("L1-2611-02", 502.05, None, 503.04, 0.55, "pass"),
    ("L1-2611-03", 501.74, None, 502.71, 0.27, "pass"),
    ("L1-2611-04", 501.52, None, 502.55, 0.12, "pass"),
    ("L1-2611-05", 501.18, None, 502.19, 0.031, "pass"),
    ("L1-2611-06", 500.61, None, 501.63, 0.0021, "hold"),
    ("L1-2611-07", 500.12, None, 501.18, 0.00004, "hold"),
    ("L1-2611-08", 501.96, None, 503.10, 0.46, "review"),
]


def oat_lots(code_of_first: str | None = None) -> tuple[LotRow, ...]:
    rows = []
    for i, (code, mean, lo, hi, p, verdict) in enumerate(_OAT_LOTS):
        if i == 0 and code_of_first is not None:
            code = code_of_first
        n = 120
        heads = [HeadOffset(h, 20, off + (0.1 * i if i % 2 else -0.1 * i)) for h, off in _BASE_OFFSETS.items()]
        heads.insert(3, HeadOffset("H4", 20, -0.2 - 1.0 * i))
        disposition = None
        if code == "L1-2611-06":
            disposition = Disposition("release", "R. Okafor", "re-weighed 50 packs, all above T1",
                                      START + timedelta(hours=8))
        rows.append(LotRow(
            lot=code, decided_at=START + timedelta(minutes=50 * i), n=n, mean=mean, target=502.0, nominal=500.0,
            unit="g", ci_low=lo, ci_high=hi, verdict=verdict,
            reason={"pass": "no shift shown", "hold": "mean shown below target (t test, alpha 0.01)",
                    "review": "normality gate failed; Wilcoxon sample too small"}[verdict],
            p_value=p, rule="oat-flakes-500", rule_version="3", disposition=disposition, heads=tuple(heads),
            giveaway=giveaway_of(mean, n, nominal=500.0, target=502.0, cost_per_unit=0.0042, currency="EUR"),
            screen="mean ≥ nominal; 0 packs below T1 (1 allowed); 0 below T2: passes the screen"))
    return tuple(rows)


def porridge_lots() -> tuple[LotRow, ...]:
    rows = []
    for i, (mean, lo, hi) in enumerate([(1004.8, 1002.9, 1006.7), (1003.1, 1001.0, 1005.2),
                                         (1005.6, 1003.5, 1007.7)]):
        rows.append(LotRow(
            lot=f"L2-2611-{i + 1:02d}", decided_at=START + timedelta(minutes=70 * i + 20), n=60, mean=mean,
            target=1004.0, nominal=None, unit="g", ci_low=lo, ci_high=hi, verdict="pass", reason="no shift shown",
            p_value=0.4, rule="porridge-1kg", rule_version="1",
            giveaway=giveaway_of(mean, 60, nominal=None, target=1004.0)))
    return tuple(rows)


def make_report(first_oat_code: str | None = None) -> Report:
    oats = ProductSection(line="L1", product="oat flakes 500 g", unit="g", lots=oat_lots(first_oat_code),
                          rules=(RuleText("oat-flakes-500", "3", OAT_RULE),))
    porridge = ProductSection(line="L2", product="porridge oats 1 kg", unit="g", lots=porridge_lots(),
                              rules=(RuleText("porridge-1kg", "1", PORRIDGE_RULE),))
    return Report(plant="Brackenfield Foods", config_name="brackenfield.toml", period_start=START,
                  period_end=START + timedelta(hours=12), generated_at=START + timedelta(hours=12, minutes=5),
                  sections=(oats, porridge))

