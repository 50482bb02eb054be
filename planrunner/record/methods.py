"""The methods paragraph: the record's settings in plain sentences, ready for a statistical report.

Built only from the record, so it always says what was run, never what was meant to run.
"""

from __future__ import annotations

from decimal import Decimal
from typing import Any

from planrunner.engines.statistics import comparison_word

INTERVAL_WORDS = {"percentile": "percentile", "bca": "bias-corrected and accelerated (BCa)"}


def readable_count(value: int | str) -> str:
    """A whole number as people read it: 11,440 up to 10¹⁵, beyond that 3.16 × 10^66 (three digits).

    Exact for any size: a count of arrangements can exceed what a float holds (and JSON may carry it
    as a string of digits), so the mantissa is rounded from the integer itself.
    """
    if isinstance(value, str) and "e" in value:  # a count beyond any float, written as decimal text
        mantissa_text, exponent_text = value.split("e")
        return f"{float(mantissa_text):.2f} × 10^{int(exponent_text)}"
    number = int(value)
    if abs(number) < 10**15:
        return f"{number:,}"
    mantissa, exponent = f"{Decimal(number):.2e}".split("e")
    return f"{mantissa} × 10^{int(exponent)}"


def _p_computation(a: dict[str, Any]) -> str:
    """How the p-value was computed: the computation the record says was used, never another."""
    details = a.get("details") or {}
    arrangements = details.get("arrangements")
    of_all = f" of all {readable_count(arrangements)} arrangements" if arrangements not in (None, "") else ""
    computation = details.get("computation") or ("enumeration" if a["exact"] else "Monte Carlo")
    if computation == "dynamic programming":
        return (f"exactly, by dynamic programming: the null distribution{of_all} was counted without listing "
                "the arrangements one by one")
    if computation == "enumeration":
        return f"by complete enumeration{of_all}"
    return (f"from m = {a['resamples']:,} random arrangements as (b + 1)/(m + 1), with b the number at least as "
            "extreme as the observed one")


def _sidedness(a: dict[str, Any]) -> str:
    first, second = (a["groups"]["compare"][:2] if a.get("groups") else ("the first group", "the second"))
    rule = (a.get("details") or {}).get("two_sided_rule", "doubled")
    two_sided = ("two-sided (twice the smaller one-sided p-value, at most 1)" if rule == "doubled" else
                 "two-sided (arrangements at least as far from the centre of the null as the observed one)")
    return {"two-sided": two_sided,
            "greater": f"one-sided (alternative: {first} greater than {second})",
            "less": f"one-sided (alternative: {first} less than {second})"}.get(a["alternative"], str(a["alternative"]))


def _list(words: list[str]) -> str:
    if len(words) <= 1:
        return "".join(words)
    return ", ".join(words[:-1]) + " and " + words[-1]


def _comparison(a: dict[str, Any]) -> str:
    if a.get("groups"):
        first, second = a["groups"]["compare"][:2]
        return f" ({first} {comparison_word(a['statistic'])} {second}, groups defined by {a['groups']['by']})"
    return ""


def _censoring(a: dict[str, Any]) -> str:
    """What a censored analysis adds: the estimator, its conventions, resamples not estimable."""
    details = a.get("details") or {}
    km = details.get("kaplan_meier")
    if not km:
        return ""
    if km.get("censoring") == "left":
        text = (f" The values of {a['outcome']} were left-censored at their detection limits; the Kaplan–Meier "
                f"estimator was applied to the flipped values M − x (M = {km.get('flipped_at')!r}) and its results "
                "mapped back.")
    else:
        text = (f" The outcome {a['outcome']} was right-censored; survival was estimated by Kaplan–Meier (events "
                "before censorings at tied times; a q-quantile is the smallest time with S(t) ≤ 1 − q).")
    missing = details.get("not_estimable")
    if missing:
        text += (f" In {missing['resamples']} of {a['resamples']} resamples ({missing['share'] * 100:.1f}%) the "
                 "statistic was not estimable (a quantile not reached, or a curve read beyond the follow-up); "
                 f"they were handled as on_degenerate: {(a.get('settings') or {}).get('on_degenerate')} declares.")
    return text


def _of_estimand(a: dict[str, Any]) -> str:
    return f", estimand '{a['estimand']}'" if a.get("estimand") else ""


def _sentence(a: dict[str, Any]) -> str:
    return _method_sentence(a) + _censoring(a)


def _method_sentence(a: dict[str, Any]) -> str:
    what = f"the {a['statistic_label']} of {a['outcome']}{_comparison(a)}"
    settings = a.get("settings") or {}
    lead = f"Analysis '{a['id']}' ({a['role']}{_of_estimand(a)})"
    if a["method"] == "bootstrap":
        listed = settings.get("intervals", [])
        methods = _list([INTERVAL_WORDS.get(m, m) for m in listed])
        level = settings.get("confidence")
        intervals = f"{level * 100:g}% {methods} intervals" if level is not None else f"{methods} intervals"
        side = {"greater": "lower", "less": "upper"}.get(settings.get("alternative", ""))
        if side is not None:  # one-sided confidence bounds
            intervals = (f"one-sided {side} {level * 100:g}% confidence bounds ({methods})" if level is not None
                         else f"one-sided {side} confidence bounds ({methods})")
        chosen = (f" (the {INTERVAL_WORDS.get(listed[0], listed[0])} interval pre-specified, the others "
                  "supplementary)" if len(listed) > 1 else "")
        null = (a.get("details") or {}).get("null_test")
        sided = "two-sided" if a.get("alternative") == "two-sided" else "one-sided"
        imposed = null is not None and null.get("interval_inverted") is None
        tested = "" if not null else (
            f" The {sided} p-value of the null value {null['null_value']:g} was obtained by the bootstrap-t with "
            f"the null imposed (resamples drawn from the fit whose target coefficient is fixed at the null value, "
            f"each studentized by its robust standard error): the {null['rule']}."
            if imposed else
            f" The {sided} p-value of the null value "
            f"{null['null_value']:g} was obtained by inverting the one-sided "
            f"{INTERVAL_WORDS.get(null['interval_inverted'], null['interval_inverted'])} bounds "
            "(the smallest alpha at which the bound excludes the null value; Efron & Tibshirani 1993, section 15.4)"
            + (", doubling the smaller one-sided p-value." if a.get("alternative") == "two-sided" else "."))
        computed = ("no interval was computed, since the replicates are drawn under the null" if imposed
                    else f"{intervals} were computed{chosen}")
        formula = (a.get("details") or {}).get("standard_error_formula")
        model = "model" in (a.get("details") or {}) and formula is not None
        if model and "studentized" in listed and not imposed:
            computed += f" (each resample, and the data, studentized by the {formula} standard error)"
        kind = "the bootstrap of the fitted model" if model else "the nonparametric bootstrap"
        return (f"{lead} estimated {what} and its uncertainty by {kind} "
                f"(scheme: {a['scheme']}) with {a['resamples']} resamples; the standard error is the standard "
                f"deviation of the replicates, and {computed}.{tested}")
    if a["method"] == "permutation":
        return (f"{lead} tested {what} by a permutation test (scheme: {a['scheme']}); the p-value, obtained "
                f"{_p_computation(a)}, is {_sidedness(a)}.")
    if a["method"] == "jackknife":
        return (f"{lead} estimated the bias and standard error of {what} by the delete-one jackknife "
                f"(scheme: {a['scheme']}).")
    return f"{lead} analysed {what} by the method '{a['method']}' (scheme: {a['scheme']})."


def precision_sentence(a: dict[str, Any]) -> str:
    """How the number of resamples was chosen, when the plan fixed a precision instead of a count."""
    p = a.get("precision")
    if not p:
        return ""
    par = p["parameters"]
    if p["rule"].startswith("none needed"):
        return (f" A decision risk of {par['decision_risk']:g} was pre-specified, but the null distribution was "
                f"computed exactly, so no resampling was needed.")
    if p["decisions"]:
        alpha = next(d for d in p["decisions"] if d["is_alpha"])
        levels = par["levels"]
        at = ("alpha" if len(levels) == 1 else
              f"alpha and at the family's levels {_list([f'{x:.4g}' for x in levels if x != par['alpha']])}")
        decided = (f"the test stopped unresolved at the maximum of {par['max_resamples']:,} resamples"
                   if alpha["decision"] == "unresolved" else
                   f"at alpha = {alpha['level']:g} the hypothesis was {alpha['decision']} after "
                   f"{alpha['resamples']:,} resamples")
        return (f" The resamples were drawn in blocks of {par['look_every']} until a sequential Monte Carlo test "
                f"with bounded resampling risk (Gandy 2009) decided at {at}, with a probability of at most "
                f"{par['decision_risk']:g} that any decision differs from the one the exact p-value gives "
                f"(at most {par['max_resamples']:,} resamples); {decided}.")
    targets = []
    if par.get("se_relative") is not None:
        targets.append(f"a relative Monte Carlo standard deviation of the standard error of {par['se_relative']:g}")
    if par.get("interval_end_sd") is not None:
        targets.append(f"a Monte Carlo standard deviation of the pre-specified interval's ends of "
                       f"{par['interval_end_sd']:g}")
    capped = " (capped at the maximum)" if p["stopped_because"] == "max_resamples" else ""
    return (f" The number of resamples, {p['resamples_used']:,}{capped}, was chosen for {_list(targets)} by the "
            f"three-step method of Andrews and Buchinsky (2000) from a first stage of "
            f"{par['first_stage_resamples']:,} resamples, rounded up to whole blocks of {par['block']}.")


def methods_text(record: dict[str, Any]) -> str:
    """One paragraph describing every analysis, the multiplicity adjustment, seeds and software."""
    parts = [f"The analyses were pre-specified in the plan '{record['plan']['id']}' "
             f"(SHA-256 {record['plan']['sha256'][:16]}…)."]
    lock = record["plan"].get("lock")
    if lock:
        count = len(lock["deviations"])
        parts.append(f"The plan was locked on {lock['locked_utc']} by {lock['operator']}; "
                     + ("the analysis ran as locked." if count == 0 else
                        f"the analysis that ran deviates from the lock in {count} place(s), listed in the record."))
    parts += [_sentence(a) + precision_sentence(a) for a in record["analyses"]]
    for fam in record.get("multiplicity", []):
        parts.append(f"The p-values of {_list([repr(i) for i in fam['family']])} were adjusted together by the "
                     f"{fam.get('method_label', fam['method'])} method.")
    seed = record["seed"]
    parts.append(f"All random numbers came from the root seed {seed['root']} through numpy's {seed['generator']} "
                 f"generator, with one independent stream per analysis derived from a hash of its id and drawn "
                 f"in blocks of {seed['draw_block']} resamples, so that every number can be reproduced exactly.")
    env = record["environment"]
    packages = env.get("packages", {})
    software = [f"planrunner {env['planrunner']}", f"Python {env['python']}"] + [
        f"{name} {packages[name]}" for name in ("numpy", "scipy") if packages.get(name)]
    parts.append(f"Software: {_list(software)}.")
    return " ".join(parts)
