"""One problem found in a plan (its dotted path, what is wrong, what to do), shared by every plan rule."""

from __future__ import annotations

import difflib
import typing
from dataclasses import dataclass

from planrunner.plan.yamlsafe import Path_


@dataclass(frozen=True)
class Problem:
    path: Path_
    message: str
    hint: str | None = None
    at_key: bool = False  # point at the key (unknown keys) rather than at its value
    offset: int = 0  # extra columns into the value (a position inside an expression)


def did_you_mean(word: str, choices: typing.Iterable[str]) -> str | None:
    match = difflib.get_close_matches(str(word), list(choices), n=1, cutoff=0.6)
    return f"did you mean '{match[0]}'?" if match else None
