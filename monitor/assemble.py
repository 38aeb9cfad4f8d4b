"""Rows of read exports -> the lots the daemon would hold after the same files, in each lot's rule's unit.

Pure: takes ``Export`` values (monitor.ingest) in arrival order and rules, returns ``LotData`` ready for the
engine, for ``lotwarden check``. Which lots exist, and how many runs made each, come from the one lot model
(``monitor.lotmodel.replay``: runs per line, closed by the next lot or a marker, reopened by late rows,
everything closed at the end of input); a reopened lot holds all its values, old and late, as the daemon's
does. Vectorised: the lot keys are factorised once, one stable argsort puts every lot's rows together in
arrival order, and each lot is a slice of the sorted arrays (no per-lot pandas work).
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from types import MappingProxyType
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from monitor.lot import EXCLUSION_REASONS, LotData, LotKey, LotSummary, no_rule_reason
from monitor.lotmodel import FileRows, count_runs, markers_of, replay, runs_of_codes
from monitor.rulebook import Rule
from monitor.units import to_rule_unit

if TYPE_CHECKING:
    from monitor.ingest import Export

KEY_COLUMNS = ("line", "product", "lot")
_NONE: Mapping[str, int] = MappingProxyType({})   # excluded_by of a lot with every value usable


@dataclass(frozen=True)
class AssembledLot:
    """A lot with the rule that judges it; ``problem`` says why it cannot be judged (no rule, units)."""

    data: LotData
    rule: Rule | None
    problem: str | None = None


def _text(frame: pd.DataFrame, column: str) -> pd.Series:
    """A text column of ``frame``; "" for every row when the export has no such column (yet)."""
    if column in frame.columns:
        return frame[column]
    return pd.Series([""] * len(frame), dtype=object)


def _codes(series: pd.Series) -> tuple[np.ndarray, list[str]]:
    """Codes 0..k-1 in order of first appearance, and the k distinct texts."""
    codes, uniques = pd.factorize(series, sort=False, use_na_sentinel=False)
    return np.asarray(codes, dtype=np.int64), [str(u) for u in uniques]


def _combine(*codes: np.ndarray) -> np.ndarray:
    """One code per distinct tuple of codes, 0..k-1 in order of first appearance."""
    out = codes[0]
    for c in codes[1:]:
        width = int(c.max()) + 1 if c.size else 1
        if width == 1:                       # one value only (one line, one product, one file): adds nothing
            continue
        if int(out.max()) == 0:
            out = c
            continue
        joined, _ = pd.factorize(out * width + c, sort=False)
        out = np.asarray(joined, dtype=np.int64)
    return out


def _first_per_code(code: np.ndarray, k: int) -> np.ndarray:
    """Index of the first row of each code 0..k-1."""
    first = np.full(k, code.shape[0], dtype=np.int64)
    np.minimum.at(first, code, np.arange(code.shape[0], dtype=np.int64))
    return first


def assemble_lots(exports: Sequence[Export],
                  rule_for: Callable[[str], Rule | None]) -> list[AssembledLot]:
    """Lots from ``exports`` grouped by (line, product, lot), in order of first appearance.

    A lot's values keep arrival order across files (files in the order given), each converted into the
    rule's unit (``monitor.units.factor_to_rule_unit``; a value without a unit is taken to be in it and
    the lot says ``unit_assumed``). Rows without a usable value stay as NaN, counted per reason in
    ``excluded_by``. Each lot says how many ``runs`` made it (``monitor.lotmodel``; a file with only end-of-lot
    markers still closes lots). Summary records are lots of their own (one run each); an unusable one is a
    lot with a ``problem``.
    ``rule_for(product)`` returns the judging rule or None; a rule with an empty ``unit`` (ad-hoc, no
    unit given) judges values in the unit they were exported in.
    """
    rules: dict[str, Rule | None] = {}

    def rule_of(product: str) -> Rule | None:
        if product not in rules:
            rules[product] = rule_for(product)
        return rules[product]

    values_exports = [e for e in exports if e.kind != "summary" and (len(e.rows) or e.end_of_lot)]
    lots = _value_lots(values_exports, rule_of) if any(len(e.rows) for e in values_exports) else []
    summaries = [lot for e in exports if e.kind == "summary" for lot in _summary_lots(e, rule_of)]
    return lots + summaries


def _summary_lots(exp: Export, rule_of: Callable[[str], Rule | None]) -> list[AssembledLot]:
    """One lot per summary record; a record with a ``problem`` is kept, to be reported as review."""
    s = exp.summaries
    cols = {c: _text(s, c).fillna("").astype(str).tolist() for c in (*KEY_COLUMNS, "unit", "problem")}
    n_col = s["n"].tolist() if "n" in s.columns else [0] * len(s)
    means, sds = s["mean"].tolist(), s["sd"].tolist()
    out: list[AssembledLot] = []
    for j in range(len(s)):
        key = LotKey(cols["line"][j], cols["product"][j], cols["lot"][j])
        rule = rule_of(key.product)
        src = cols["unit"][j]
        mean, sd = float(means[j]), float(sds[j])
        n = n_col[j]
        n = int(n) if isinstance(n, (int, np.integer)) or (isinstance(n, float) and np.isfinite(n)) else 0
        unit = rule.unit if rule is not None and rule.unit else src
        assumed = False
        problem = None if rule is not None else no_rule_reason(key.product)
        if rule is not None:
            conv = to_rule_unit(src, rule.unit, exp.density)
            assumed, problem = conv.assumed, conv.problem
            if problem is None:
                mean, sd = mean * conv.factor, sd * abs(conv.factor)
        if cols["problem"][j]:   # an unusable record is a review lot with its reason, never left out
            problem = f"the lot summary is not usable: {cols['problem'][j]}"
        data = LotData(key=key, summary=LotSummary(n, mean, sd), files=(exp.path,), unit=unit,
                       unit_assumed=assumed, runs=1)
        out.append(AssembledLot(data, rule, problem))
    return out


def _value_lots(exports: list[Export],
                rule_of: Callable[[str], Rule | None]) -> list[AssembledLot]:
    """The lots of all value exports, one pass over the rows of all files together."""
    frames = [e.rows for e in exports]

    def column(name: str) -> pd.Series:
        parts = [_text(f, name) for f in frames]
        return parts[0] if len(parts) == 1 else pd.concat(parts, ignore_index=True)

    sizes = np.array([len(f) for f in frames], dtype=np.int64)
    file_of_row = np.repeat(np.arange(len(frames), dtype=np.int64), sizes)
    values = np.concatenate([f["value"].to_numpy(dtype=np.float64) for f in frames])

    line_c, lines = _codes(column("line"))
    prod_c, products = _codes(column("product"))
    lot_c, lot_names = _codes(column("lot"))
    lot_of_row = _combine(line_c, prod_c, lot_c)
    k = int(lot_of_row.max()) + 1
    order = np.argsort(lot_of_row, kind="stable")            # each lot's rows together, in arrival order
    counts = np.bincount(lot_of_row, minlength=k)
    ends = np.cumsum(counts)
    starts = ends - counts
    first = order[starts]                                    # first row of each lot
    lot_line, lot_prod, lot_code = line_c[first].tolist(), prod_c[first].tolist(), lot_c[first].tolist()

    # Units: one factor per distinct (unit, product's rule, file's density); rows take theirs by code.
    unit_c, units = _codes(column("unit"))
    combo = _combine(unit_c, prod_c, file_of_row)
    n_combo = int(combo.max()) + 1
    combo_first = _first_per_code(combo, n_combo)
    factor = np.ones(n_combo)
    assumed = np.zeros(n_combo, dtype=bool)
    failure: dict[int, str] = {}
    for c, row in enumerate(combo_first.tolist()):
        rule = rule_of(products[prod_c[row]])
        if rule is None:
            continue
        conv = to_rule_unit(units[unit_c[row]], rule.unit, exports[file_of_row[row]].density)
        if conv.problem is None:
            factor[c], assumed[c] = conv.factor, conv.assumed
        else:
            failure[c] = conv.problem
    row_factor = factor[combo]
    converted = values if bool((row_factor == 1.0).all()) else values * row_factor
    sorted_values = converted[order]
    lot_assumed = np.bincount(lot_of_row, weights=assumed[combo], minlength=k) > 0
    lot_failure: dict[int, str] = {}
    if failure:                                              # a lot names the unit of its first failing row
        failed_rows = np.flatnonzero(np.isin(combo, np.fromiter(failure, dtype=np.int64)))
        failed_lots, at = np.unique(lot_of_row[failed_rows], return_index=True)
        lot_failure = {lot: failure[int(combo[failed_rows[j]])]
                       for lot, j in zip(failed_lots.tolist(), at.tolist(), strict=True)}
    # Ad-hoc rule without a unit: a lot is judged in its exported unit, which must be one unit.
    named = unit_c[order]
    nonblank = np.array([u != "" for u in units])[named]
    lot_unit, lot_mixed = _lot_units(named, nonblank, starts, ends)
    lot_unit_l, lot_mixed_l = lot_unit.tolist(), lot_mixed.tolist()

    # Rows without a usable value: NaN in place, counted per reason.
    excluded_by: dict[int, dict[str, int]] = {}
    if any("excluded" in f.columns for f in frames):       # a missing column means: no such rows
        ex_c, reasons = _codes(column("excluded"))
        for ri, reason in enumerate(reasons):
            if not reason:
                continue
            rows = ex_c == ri
            sorted_values[rows[order]] = np.nan
            why = reason if reason in EXCLUSION_REASONS else "not_finite"
            per_lot = np.bincount(lot_of_row[rows], minlength=k)
            for lot in np.flatnonzero(per_lot).tolist():
                counts_of = excluded_by.setdefault(lot, {})
                counts_of[why] = counts_of.get(why, 0) + int(per_lot[lot])

    # Heads: a tuple per lot when any of its rows names a head.
    head_c, head_names = _codes(column("head"))
    named_heads = np.array([h != "" for h in head_names])
    lot_has_heads = np.bincount(lot_of_row, weights=named_heads[head_c], minlength=k) > 0
    sorted_heads: list[str] = np.asarray(head_names, dtype=object)[head_c[order]].tolist() \
        if lot_has_heads.any() else []

    # Files: most lots lie in one file; a lot spread over several lists them in the order given.
    paths = [e.path for e in exports]
    sorted_files = file_of_row[order]
    f_first = sorted_files[starts].tolist()
    f_last = sorted_files[ends - 1].tolist()

    # Runs: the files through the one lot model, in the order given, as the daemon takes them.
    keys = [LotKey(lines[lot_line[i]], products[lot_prod[i]], lot_names[lot_code[i]]) for i in range(k)]
    runs = _runs(exports, lot_of_row, sizes, keys, line_c[first])

    out: list[AssembledLot] = []
    start_l, end_l = starts.tolist(), ends.tolist()
    assumed_l, heads_l = lot_assumed.tolist(), lot_has_heads.tolist()
    for i in range(k):
        a, b = start_l[i], end_l[i]
        key = keys[i]
        rule = rule_of(key.product)
        problem: str | None = None
        unit = units[lot_unit_l[i]] if lot_unit_l[i] >= 0 else ""
        if rule is None:
            problem = no_rule_reason(key.product)
        elif not rule.unit:
            if lot_mixed_l[i]:
                problem = "the lot mixes units; give --unit to convert them"
        else:
            unit = rule.unit
            if i in lot_failure:
                problem = lot_failure[i]
        files = (paths[f_first[i]],) if f_first[i] == f_last[i] else \
            tuple(paths[f] for f in np.unique(sorted_files[a:b]).tolist())
        data = LotData(key=key, values=sorted_values[a:b], heads=tuple(sorted_heads[a:b]) if heads_l[i] else None,
                       files=files, unit=unit, unit_assumed=assumed_l[i], excluded_by=excluded_by.get(i, _NONE),
                       runs=runs[i])
        out.append(AssembledLot(data, rule, problem))
    return out


def _runs(exports: list[Export], lot_of_row: np.ndarray, sizes: np.ndarray, keys: list[LotKey],
          line_of_lot: np.ndarray) -> list[int]:
    """Per lot (code), how many runs made it: each file's rows (codes ``lot_of_row``, ``sizes`` rows per file)
    and markers replayed through ``monitor.lotmodel`` in the order given, the way the daemon takes them
    (without markers, by the model's vectorised count)."""
    if not any(exp.end_of_lot for exp in exports):
        return count_runs(lot_of_row, line_of_lot).tolist()
    offsets = np.concatenate(([0], np.cumsum(sizes))).tolist()
    files = []
    for f, exp in enumerate(exports):
        rows = exp.rows
        n = int(sizes[f])
        src = (rows["source_line"].to_numpy(dtype=np.int64) if "source_line" in rows.columns and n
               else np.arange(1, n + 1, dtype=np.int64))
        files.append(FileRows(runs_of_codes(lot_of_row[offsets[f]:offsets[f + 1]], keys), src,
                              markers_of(exp.end_of_lot)))
    per_key = replay(files).runs
    return [per_key.get(key, 1) for key in keys]


def _lot_units(named: np.ndarray, nonblank: np.ndarray, starts: np.ndarray,
               ends: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Per lot, the code of the first non-blank unit its rows carry (-1: none), and whether it has several."""
    k = starts.shape[0]
    if named.size == 0:
        return np.full(k, -1, dtype=np.int64), np.zeros(k, dtype=bool)
    lo = np.minimum.reduceat(np.where(nonblank, named, np.iinfo(np.int64).max), starts)
    hi = np.maximum.reduceat(np.where(nonblank, named, -1), starts)
    mixed = (hi >= 0) & (lo != hi)
    first = np.where(hi >= 0, lo, -1)
    for i in np.flatnonzero(mixed).tolist():     # the first unit in arrival order, not the smallest code
        seg = named[starts[i]:ends[i]][nonblank[starts[i]:ends[i]]]
        first[i] = seg[0]
    return first, mixed
