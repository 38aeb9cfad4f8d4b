"""Groups the rows of one or more read exports into lots, in the unit of each lot's rule.

Pure: takes ``Export`` values (monitor.ingest) and rules, returns ``LotData`` ready for the engine.
Used by ``lotwarden check``; the daemon assembles lots from its state store instead.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable, Sequence

import numpy as np
import pandas as pd

from monitor.lot import LotData, LotKey, LotSummary
from monitor.rulebook import Rule
from monitor.units import conversion_factor


@dataclass(frozen=True)
class AssembledLot:
    """A lot with the rule that judges it; ``problem`` says why it cannot be judged (no rule, units)."""

    data: LotData
    rule: Rule | None
    problem: str | None = None


def _factors(units: pd.Series, rule_unit: str, density: float | None) -> np.ndarray:
    """Per-row conversion factor into ``rule_unit`` (raises ValueError naming the unit pair)."""
    out = np.empty(len(units), dtype=np.float64)
    codes, uniques = pd.factorize(units)
    for i, u in enumerate(uniques):
        out[codes == i] = conversion_factor(u, rule_unit, density)
    return out


def assemble_lots(exports: Sequence, rule_for: Callable[[str], Rule | None]) -> list[AssembledLot]:
    """Lots from ``exports`` grouped by (line, product, lot), in order of first appearance.

    A lot's values keep arrival order across files (files in the order given). Summary records are lots
    of their own. ``rule_for(product)`` returns the judging rule or None; a rule with an empty ``unit``
    (ad-hoc, no unit given) judges values in the unit they were exported in.
    """
    parts: list[pd.DataFrame] = []
    summaries: list[AssembledLot] = []
    for order, exp in enumerate(exports):
        if exp.kind == "summary":
            for rec in exp.summaries.itertuples(index=False):
                key = LotKey(str(rec.line), str(rec.product), str(rec.lot))
                rule = rule_for(key.product)
                unit = rule.unit if rule and rule.unit else str(rec.unit)
                problem = None if rule else f"no rule matches product {key.product or '(none)'!r}"
                mean, sd = float(rec.mean), float(rec.sd)
                if rule and rule.unit:
                    try:
                        f = conversion_factor(str(rec.unit), rule.unit, exp.density)
                        mean, sd = mean * f, sd * abs(f)
                    except ValueError as exc:
                        problem = f"values in {rec.unit} cannot be judged in {rule.unit}: {exc}"
                data = LotData(key=key, summary=LotSummary(int(rec.n), mean, sd), files=(exp.path,), unit=unit)
                summaries.append(AssembledLot(data, rule, problem))
            continue
        df = exp.rows.copy()
        df["_file"] = exp.path
        df["_order"] = order
        df["_density"] = np.nan if exp.density is None else float(exp.density)
        parts.append(df)
    lots: list[AssembledLot] = []
    if parts:
        rows = pd.concat(parts, ignore_index=True)
        for (line, product, lot), g in rows.groupby(["line", "product", "lot"], sort=False):
            key = LotKey(str(line), str(product), str(lot))
            rule = rule_for(key.product)
            files = tuple(dict.fromkeys(g["_file"]))
            values = g["value"].to_numpy(dtype=np.float64)
            heads = tuple(g["head"].astype(str)) if (g["head"] != "").any() else None
            problem = None
            unit = str(g["unit"].iloc[0])
            if rule is None:
                problem = f"no rule matches product {key.product or '(none)'!r}"
            elif not rule.unit:  # ad-hoc rule without a unit: judge in the unit exported
                if g["unit"].nunique() > 1:
                    problem = "the lot mixes units; give --unit to convert them"
            else:
                unit = rule.unit
                try:
                    density = g["_density"].iloc[0]
                    values = values * _factors(g["unit"], rule.unit, None if np.isnan(density) else density)
                except ValueError as exc:
                    problem = f"values cannot be judged in {rule.unit}: {exc}"
            lots.append(AssembledLot(LotData(key=key, values=values, heads=heads, files=files, unit=unit),
                                     rule, problem))
    return lots + summaries
