"""Words beside the numbers, shared by the reports and the terminal table, built from the record.

- a one-sided p-value says its direction ("one-sided, foam < standard");
- the effect column shows an effect on the outcome's scale: for a test statistic that is not one
  (a rank sum W, a t, an F) it shows the shift estimate when the record has one (Hodges–Lehmann for
  the rank sum) and names the test statistic beside it (W = 1197); without a shift estimate it shows
  the test statistic, named as such;
- a cluster design shows clusters per group beside the rows;
- an interval says whether it is two-sided or a one-sided bound ("percentile, one-sided lower 95%
  bound"), and a bound shows its one end only (the record writes the open end as null).
"""

from __future__ import annotations

from typing import Any

# permutation statistics that test, but do not measure an effect on the outcome's scale
TEST_STATISTICS = {"rank_sum": "W", "signed_rank": "T+", "t_pooled": "t", "t_welch": "t", "one_way_f": "F",
                   "rank_h": "H"}
ASSOCIATION = {"correlation", "spearman", "kendall", "slope"}

# interval methods as the trade writes them (the record keeps the plan's lower-case keys)
INTERVAL_NAMES = {"percentile": "percentile", "bca": "BCa", "basic": "basic", "normal": "normal",
                  "studentized": "studentized", "shift": "shift"}


def interval_name(method: Any) -> str:
    """An interval method as a reader writes it (BCa, not bca); an unknown one as recorded."""
    return INTERVAL_NAMES.get(str(method), str(method))


def direction(entry: dict[str, Any]) -> str | None:
    """'one-sided, A > B' (or '<') for a one-sided p-value; None for a two-sided one or none. A
    bootstrap p-value names its null value: 'one-sided, difference in means > -5 (null value)'."""
    alternative = entry.get("alternative")
    null = ((entry.get("details") or {}).get("null_test") or {})
    if null and entry.get("p_value") is not None:
        sign = {"greater": ">", "less": "<"}.get(str(alternative), "≠")
        sided = "two-sided" if sign == "≠" else "one-sided"
        label = entry.get("statistic_label", "statistic")
        return f"{sided}, {label} {sign} {_plain(null.get('null_value'))} (null value)"
    if alternative not in ("greater", "less") or entry.get("p_value") is None:
        return None
    sign = ">" if alternative == "greater" else "<"
    compare = (entry.get("groups") or {}).get("compare") or []
    if len(compare) == 2:
        return f"one-sided, {compare[0]} {sign} {compare[1]}"
    if entry.get("statistic") in ASSOCIATION:
        return f"one-sided, {'positive' if sign == '>' else 'negative'} association"
    return f"one-sided, {entry.get('statistic_label', 'statistic')} {'large' if sign == '>' else 'small'}"


def effect(entry: dict[str, Any]) -> tuple[Any, str | None, str | None]:
    """(effect value, what it is, the test statistic in words) for the effect column.

    The value is the record's estimate unless the statistic only tests (``TEST_STATISTICS``); then
    it is the shift estimate when there is one, else the test statistic itself (labelled)."""
    estimate = entry.get("estimate")
    symbol = TEST_STATISTICS.get(entry.get("statistic", "")) if entry.get("method") == "permutation" else None
    if symbol is None:
        return estimate, None, None
    statistic = f"test statistic {symbol} = {_plain(estimate)}"
    shift = (entry.get("details") or {}).get("shift_estimate")
    if shift is None:
        return estimate, "test statistic", None
    what = "shift, Hodges–Lehmann" if entry.get("statistic") == "rank_sum" else "shift"
    return shift, what, statistic


def group_sizes(entry: dict[str, Any]) -> list[str]:
    """'foam 40' per group, or 'foam 40 rows in 8 clusters' for a cluster design."""
    n = entry.get("n") or {}
    clusters = n.get("clusters") or {}
    return [f"{g} {k} rows in {clusters[g]} clusters" if g in clusters else f"{g} {k}"
            for g, k in (n.get("groups") or {}).items()]


def _plain(value: Any) -> str:
    if isinstance(value, float):
        return f"{value:.6g}"
    return "—" if value is None else str(value)


def one_sided(interval: dict[str, Any]) -> str | None:
    """"lower" or "upper" for a one-sided confidence bound; None for a two-sided interval."""
    side = interval.get("side")
    return side if side in ("lower", "upper") else None


def interval_label(interval: dict[str, Any], percent: str) -> str:
    """'percentile 95%', or 'BCa, one-sided lower 95% bound' (``percent``: the level, formatted)."""
    side = one_sided(interval)
    name = interval_name(interval.get("method"))
    if side is None:
        return f"{name} {percent}%"
    return f"{name}, one-sided {side} {percent}% bound"


def interval_heading(interval: dict[str, Any], percent: str) -> str:
    """'percentile interval, 95%', or 'percentile, one-sided lower 95% bound' (a table row's heading)."""
    if one_sided(interval) is None:
        return f"{interval_name(interval.get('method'))} interval, {percent}%"
    return interval_label(interval, percent)


def interval_ends(interval: dict[str, Any], lower: str, upper: str) -> str:
    """'lower to upper' for an interval; a one-sided bound's own end only (its other end is open)."""
    side = one_sided(interval)
    if side == "lower":
        return lower
    if side == "upper":
        return upper
    return f"{lower} to {upper}"


def alpha(entry: dict[str, Any]) -> Any:
    """The alpha a p-value is never rounded across: the permutation test's `settings.alpha`, or for a
    bootstrap p-value of a null value 1 − confidence (`details.null_test.alpha`)."""
    given = (entry.get("settings") or {}).get("alpha")
    if given is not None:
        return given
    return ((entry.get("details") or {}).get("null_test") or {}).get("alpha")
def precision_line(entry: dict[str, Any]) -> str | None:
    """The achieved precision of an analysis whose resamples were chosen to a stated precision, in
    words: a test's decision with its bounded risk (or ``unresolved``), a bootstrap's achieved
    Monte Carlo accuracy against its targets. None with a fixed number of resamples."""
    p = entry.get("precision")
    if not p:
        return None
    par = p["parameters"]
    if p["rule"].startswith("none needed"):
        return f"exact computation: no resampling needed for the decision risk {par['decision_risk']:g}"
    if p["decisions"]:
        parts = []
        for d in p["decisions"]:
            where = "alpha" if d["is_alpha"] else "family level"
            if d["decision"] == "unresolved":
                parts.append(f"unresolved at {where} {d['level']:.4g}: no decision within the maximum of "
                             f"{par['max_resamples']:,} resamples")
            else:
                parts.append(f"{d['decision']} at {where} {d['level']:.4g} after {d['resamples']:,} resamples")
        return (f"{'; '.join(parts)} (chance that a decision differs from the exact p-value's: at most "
                f"{par['decision_risk']:g}; {p['resamples_used']:,} resamples drawn)")
    achieved = p.get("achieved") or {}
    parts = []
    for key, words in (("se_relative", "relative Monte Carlo s.d. of the standard error"),
                       ("interval_end_sd", "Monte Carlo s.d. of the pre-specified interval's ends")):
        if par.get(key) is not None:
            got = achieved.get(key)
            parts.append(f"{words} {'—' if got is None else f'{got:.2g}'} (target {par[key]:g})")
    capped = "; the target was not reached: stopped at max_resamples" if p["stopped_because"] == "max_resamples" else ""
    return f"{p['resamples_used']:,} resamples: {'; '.join(parts)}{capped}"


def unresolved(entry: dict[str, Any]) -> bool:
    """A test drawn to a decision risk that reached its maximum resamples without deciding at alpha."""
    decisions = (entry.get("precision") or {}).get("decisions") or []
    return any(d.get("decision") == "unresolved" and d.get("is_alpha") for d in decisions)
