"""What changed between two runs: areas whose published picture moved.

An area is listed when, between the earlier and the later run,
- its signal changed (higher / unclear / lower, the 0.8 / 0.2 rule) and the
  probability behind it moved by at least ``signal_margin`` (default 0.05:
  about two Monte Carlo standard errors of the difference of two runs with an
  effective sample size of 400 at p = 0.8, sqrt(2 * 0.8 * 0.2 / 400) = 0.028;
  without it, areas sitting on a cut-off flip labels on sampler noise alone), or
- an exceedance probability P(theta > t) moved by more than ``min_change``, or
- its rank interval moved: the two intervals no longer overlap, or (when
  ``rank_shift`` is given) its median rank moved by at least that many places.

Both tables are *published* tables (from the history store), so masked counts
stay masked here too.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from .history import EXCEEDANCE_PREFIX, HistoryStore, exceedance_columns
from .job import threshold_label

CHANGE_COLUMNS = ("area_id", "reasons", "signal_before", "signal_after")


@dataclass(frozen=True)
class ChangeRules:
    """How much movement counts as a change."""

    min_change: float = 0.1
    rank_shift: float | None = None
    signal_margin: float = 0.05


@dataclass(frozen=True)
class RunPair:
    """The two runs being compared, earlier first; ``caution`` if one did not converge."""

    before: str
    after: str
    caution: str | None = None


class NothingToCompare(Exception):
    """Fewer than two converged runs, or the named run is unknown or did not converge."""


def _fmt_rank(lower, upper) -> str:
    return "?" if pd.isna(lower) or pd.isna(upper) else f"{int(lower)}-{int(upper)}"


def area_change_reasons(before: pd.Series, after: pd.Series, thresholds: list[str],
                        rules: ChangeRules, signal_column: str | None = None) -> list[str]:
    """Why one area (present in both runs) counts as changed; empty if it does not.

    ``signal_column`` is the exceedance column the signal is read from (the job's
    first threshold).
    """
    reasons = []
    if before["signal"] != after["signal"]:
        moved = (abs(after[signal_column] - before[signal_column])
                 if signal_column in before.index and signal_column in after.index else np.inf)
        if pd.isna(moved) or moved >= rules.signal_margin:
            reasons.append(f"signal {before['signal']} -> {after['signal']}")
    for column in thresholds:
        p0, p1 = before[column], after[column]
        if pd.notna(p0) and pd.notna(p1) and abs(p1 - p0) > rules.min_change:
            label = column[len(EXCEEDANCE_PREFIX):]
            reasons.append(f"P(RR>{label}) {p0:.2f} -> {p1:.2f} ({p1 - p0:+.2f})")
    l0, u0, l1, u1 = before["rank_lower"], before["rank_upper"], after["rank_lower"], after["rank_upper"]
    if pd.notna(l0) and pd.notna(l1) and (l1 > u0 or u1 < l0):
        reasons.append(f"rank interval {_fmt_rank(l0, u0)} -> {_fmt_rank(l1, u1)} (no overlap)")
    elif rules.rank_shift is not None:
        shift = after["rank_median"] - before["rank_median"]
        if pd.notna(shift) and abs(shift) >= rules.rank_shift:
            reasons.append(f"median rank {before['rank_median']:g} -> {after['rank_median']:g} "
                           f"(moved {abs(shift):g})")
    return reasons


def compare_area_tables(before: pd.DataFrame, after: pd.DataFrame,
                        rules: ChangeRules = ChangeRules(),
                        signal_column: str | None = None) -> pd.DataFrame:
    """One row per changed area (plus areas present in only one run), largest move first.

    ``signal_column`` defaults to the first ``p_above_*`` column of ``after``.
    """
    signal_column = signal_column or next(iter(exceedance_columns(after)), None)
    before = before.assign(area_id=before["area_id"].astype(str)).set_index("area_id")
    after = after.assign(area_id=after["area_id"].astype(str)).set_index("area_id")
    thresholds = sorted(set(exceedance_columns(before.reset_index()))
                        & set(exceedance_columns(after.reset_index())),
                        key=lambda c: float(c[len(EXCEEDANCE_PREFIX):]))
    rows = []
    for area_id in sorted(set(before.index) | set(after.index)):
        old = before.loc[area_id] if area_id in before.index else None
        new = after.loc[area_id] if area_id in after.index else None
        if old is None:
            reasons = ["new area (not in the earlier run)"]
        elif new is None:
            reasons = ["area no longer present"]
        else:
            reasons = area_change_reasons(old, new, thresholds, rules, signal_column)
        if reasons:
            rows.append(change_row(area_id, old, new, thresholds, reasons))
    columns = list(CHANGE_COLUMNS) + [f"{c}_{when}" for c in thresholds for when in ("before", "after")] \
        + [f"{c}_change" for c in thresholds] \
        + [f"{c}_{when}" for c in ("rr_median", "rank_median", "rank_lower", "rank_upper", "observed")
           for when in ("before", "after")]
    table = pd.DataFrame(rows, columns=columns)
    if thresholds and len(table):
        size = pd.to_numeric(table[f"{thresholds[0]}_change"], errors="coerce").abs().fillna(-np.inf)  # new/gone areas last
        table = table.iloc[np.argsort(-size.to_numpy(), kind="stable")].reset_index(drop=True)
    return table


def change_row(area_id: str, old: pd.Series | None, new: pd.Series | None,
               thresholds: list[str], reasons: list[str]) -> dict:
    def value(row: pd.Series | None, column: str):
        return row[column] if row is not None and column in row.index else pd.NA

    row = {"area_id": area_id, "reasons": "; ".join(reasons),
           "signal_before": value(old, "signal"), "signal_after": value(new, "signal")}
    for column in thresholds:
        row[f"{column}_before"] = value(old, column)
        row[f"{column}_after"] = value(new, column)
        both = old is not None and new is not None
        row[f"{column}_change"] = (new[column] - old[column]) if both else pd.NA
    for column in ("rr_median", "rank_median", "rank_lower", "rank_upper", "observed"):
        row[f"{column}_before"] = value(old, column)
        row[f"{column}_after"] = value(new, column)
    return row


def choose_runs(store: HistoryStore, job: str, since: str | None = None,
                current: str | None = None) -> RunPair:
    """Which two converged runs to compare: ``current`` (default the newest) against
    ``since`` (default the converged run before it)."""
    converged = store.converged_runs(job)
    if current is None:
        if not converged:
            raise NothingToCompare(f"job {job!r} has no converged run in the history store")
        current = converged[0]
    elif current not in converged:
        raise NothingToCompare(f"run {current!r} is not a converged run of job {job!r}")
    if since is None:
        earlier = converged[converged.index(current) + 1:]
        if not earlier:
            raise NothingToCompare(f"job {job!r} has no converged run before {current}")
        since = earlier[0]
    elif store.get_run(since) is None:
        raise NothingToCompare(f"run {since!r} is not in the history store")
    caution = None
    if since not in converged:
        caution = f"run {since} did not converge; differences may be sampler noise"
    return RunPair(before=since, after=current, caution=caution)


def changes_between(store: HistoryStore, pair: RunPair, rules: ChangeRules) -> pd.DataFrame:
    """Compare two stored runs; the signal is read from the later run's first threshold."""
    thresholds = (store.get_run(pair.after) or {}).get("thresholds") or []
    signal_column = f"{EXCEEDANCE_PREFIX}{threshold_label(float(thresholds[0]))}" if thresholds else None
    return compare_area_tables(store.area_results(pair.before), store.area_results(pair.after),
                               rules, signal_column)


def format_changes(table: pd.DataFrame, pair: RunPair, rules: ChangeRules) -> str:
    """A readable table of changed areas."""
    rank_rule = "rank intervals no longer overlap"
    if rules.rank_shift is not None:
        rank_rule += f" or median rank moved {rules.rank_shift:g}+ places"
    head = (f"Changes from run {pair.before} to run {pair.after}\n"
            f"  (exceedance moved by more than {rules.min_change:g}; signal changed with a move of "
            f"{rules.signal_margin:g}+; {rank_rule})")
    if pair.caution:
        head += f"\n  CAUTION: {pair.caution}"
    if table.empty:
        return head + "\n  no area changed."
    lines = [head, f"  {len(table)} area(s) changed."]
    width = max(len("area"), int(table["area_id"].str.len().max()))
    lines.append(f"  {'area':<{width}}  what changed")
    lines += [f"  {row.area_id:<{width}}  {row.reasons}" for row in table.itertuples()]
    return "\n".join(lines)
