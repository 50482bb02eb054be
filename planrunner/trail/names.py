"""Names of people (the operator of a run or a lock, a signer): one line of visible text.

A name is written into the record, the reports, the lock, the run history and the terminal
tables. A line break, a tab or another control character in it would split or misalign those lines
(the history escapes them, the reports and the terminal would not), and a bidirectional override
would make the name read differently from what it is. So such a name is refused, with the
character and its position, rather than escaped in some places and not in others.
"""

from __future__ import annotations

import unicodedata

from planrunner.errors import PlanrunnerError

# explicit bidirectional embeddings, overrides and isolates: they reorder the text that follows
_BIDI_CONTROLS = frozenset("\u202a\u202b\u202c\u202d\u202e\u2066\u2067\u2068\u2069")


def require_person_name(name: str, option: str) -> str:
    """``name`` itself when it is one line of visible text; else a located refusal naming the first
    offending character (``option`` is the option it came from, e.g. ``--operator``)."""
    if not name.strip():
        raise PlanrunnerError("the name is empty", where=option, hint=f"give {option} as visible text")
    for position, char in enumerate(name, start=1):
        category = unicodedata.category(char)
        if category in ("Cc", "Zl", "Zp") or char in _BIDI_CONTROLS:
            label = unicodedata.name(char, "a control character")
            raise PlanrunnerError(
                f"the name {name!r} holds U+{ord(char):04X} ({label}) at character {position}: a name is "
                "written on one line in the record, the reports and the history",
                where=option, hint=f"give {option} without line breaks, tabs or other control characters")
    return name
