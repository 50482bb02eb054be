"""How many digits a report shows: no more than the Monte Carlo error supports.

The record keeps every number at full precision; these rules only decide what is printed.

Rule 1 (a number with a Monte Carlo s.d. s > 0): round it to the decimal place of the leading
digit of s, i.e. to 10^floor(log10 s). The last digit shown is then uncertain by roughly one to
nine units, and no digit shown is pure noise (the usual convention of quoting a result to the
first significant digit of its uncertainty; from common practice). At most 6 significant digits.
Examples: SE 5.7390 with s = 0.036 → 5.74; p = 0.0486 with s = 0.0022 → 0.049.

Rule 2 (a number without Monte Carlo error: an estimate from the data, a jackknife number, an
exact p-value, or s = 0): 4 significant digits.

Rule 3 (a Monte Carlo s.d. itself): 2 significant digits.

Rule 4 (a p-value): as rules 1–2, but never printed as 0: a Monte Carlo p-value is at least
1/(m+1); should rounding reach 0 the value is shown to 1 significant digit.

Rule 5 (an adjusted p-value): every adjusted p-value of a family is a function of the family's
p-values in which each is multiplied by at most F (F = m, the family size, for Bonferroni, Holm,
Hochberg and Benjamini–Hochberg; F = m·(1 + 1/2 + … + 1/m) for Benjamini–Yekutieli, and used for
any other method as a cautious bound), so its Monte Carlo s.d. is taken as F × the largest s.d.
among the members whose Monte Carlo p-values it moves with (found by moving each by ±2 of its s.d.),
and rule 4 applies with that bound; an adjusted p-value that moves with none is exact (rule 2). A
max-T adjusted p-value is one proportion of the joint permutations: s.d. sqrt(p(1 − p)/B).

Rule 6 (alpha): a p-value is never printed rounded across alpha: when the rounded text would lie on
the other side of alpha than the value (0.05022 shown as 0.050 with alpha = 0.05), digits are
added until it does not.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterable, Sequence
from typing import Any

from planrunner.record.methods import readable_count

SIGNIFICANT = 4
MAX_SIGNIFICANT = 6


def _real(value: Any) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value)


def significant(value: Any, digits: int = SIGNIFICANT) -> str:
    """`digits` significant digits; '—' for a missing number; integers as they are."""
    if value is None:
        return "—"
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return str(value)
    if isinstance(value, int):
        return str(value)
    if not math.isfinite(value):
        return str(value)
    if value == 0:
        return "0"
    return f"{value:.{digits}g}"


def decimals_for(sd: Any) -> int | None:
    """Decimal places that rule 1 keeps for a Monte Carlo s.d. (negative: round to tens, ...)."""
    if not _real(sd) or sd <= 0:
        return None
    return -math.floor(math.log10(sd))


def _rounded(value: float, decimals: int) -> str:
    if decimals >= 0:
        text = f"{value:.{decimals}f}"
    else:
        text = f"{round(value, decimals):.0f}"
    if text.startswith("-") and not any(c in "123456789" for c in text):
        text = text[1:]  # -0.0 is 0.0
    return text


def with_mc(value: Any, sd: Any) -> str:
    """Rule 1 where there is a Monte Carlo s.d., else rule 2."""
    if not _real(value):
        return significant(value)
    decimals = decimals_for(sd)
    if decimals is None:
        return significant(value)
    if value != 0:
        decimals = min(decimals, MAX_SIGNIFICANT - 1 - math.floor(math.log10(abs(value))))
    return _rounded(float(value), decimals)


def mc_sd(sd: Any) -> str:
    """Rule 3."""
    if not _real(sd):
        return "—"
    return "0" if sd == 0 else f"{sd:.2g}"


def p_value(p: Any, sd: Any = None, alpha: Any = None) -> str:
    """Rules 4 and 6."""
    if p is None:
        return "—"
    if not _real(p):
        return str(p)
    if decimals_for(sd) is None:
        text = f"{p:.4g}" if p >= 1e-4 or p == 0 else f"{p:.2e}"
    else:
        text = with_mc(p, sd)
        if p > 0 and float(text) == 0:
            text = f"{p:.1g}"
    return _same_side(p, text, alpha)


def _same_side(p: float, text: str, alpha: Any) -> str:
    """Rule 6: more digits until the printed value lies on the same side of alpha as p itself."""
    if not _real(alpha) or (p <= alpha) == (float(text) <= alpha):
        return text
    for digits in range(2, 18):
        text = f"{p:.{digits}g}"
        if (p <= alpha) == (float(text) <= alpha):
            return text
    return repr(float(p))


def family_factor(method: str, size: int) -> float:
    """F of rule 5."""
    if method in ("bonferroni", "holm", "hochberg", "benjamini-hochberg"):
        return float(size)
    return size * sum(1.0 / i for i in range(1, size + 1))


def adjusted_sd(method: str, sds: Iterable[Any]) -> float | None:
    """Rule 5's bound on the Monte Carlo s.d. of the family's adjusted p-values (None: no MC error)."""
    values = list(sds)
    known = [s for s in values if _real(s)]
    if not known or max(known) <= 0:
        return None
    return family_factor(method, len(values)) * max(known)


def adjusted_sds(method: str, p_values: Sequence[float], sds: Sequence[Any],
                 adjust: Callable[[list[float], str], Sequence[float]]) -> list[float | None]:
    """Rule 5 per member: F × the largest s.d. among the members its adjusted p-value moves with.

    Member k's Monte Carlo p is moved by ±2 of its s.d.; an adjusted p-value that does not move with
    any Monte Carlo member (an exact member whose adjusted value comes from exact p-values only) has
    no Monte Carlo error and is printed as an exact value (rule 2), never with another member's error.
    """
    factor = family_factor(method, len(p_values))
    base = list(adjust(list(p_values), method))
    moved_by: list[list[float]] = [[] for _ in p_values]
    for k, sd in enumerate(sds):
        if not _real(sd) or sd <= 0:
            continue
        for shift in (-2.0 * sd, 2.0 * sd):
            trial = list(p_values)
            trial[k] = min(1.0, max(0.0, trial[k] + shift))
            for i, value in enumerate(adjust(trial, method)):
                if value != base[i] and sd not in moved_by[i]:
                    moved_by[i].append(sd)
    return [factor * max(found) if found else None for found in moved_by]


def count(value: Any) -> str:
    """A count as people read it: thousands separated up to 10¹⁵, beyond that in powers of ten (an
    exact dynamic-programming null can count more arrangements than any integer type holds)."""
    if isinstance(value, str) and value.lstrip("-").isdigit():
        value = int(value)  # an exact count kept as a string of digits
    if isinstance(value, str) and "e+" in value:
        return readable_count(value)  # a count beyond any float, kept as decimal text
    if isinstance(value, int) and not isinstance(value, bool):
        return readable_count(value)  # exact at any size (no float overflow past 1e308)
    if not _real(value):
        return "—"
    if float(value).is_integer() and abs(value) < 1e15:
        return f"{int(value):,}"
    if abs(value) >= 1e15:
        return readable_count(int(value))
    return significant(value)
