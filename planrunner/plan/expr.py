"""Row filters: the small expression language behind a dataset's ``rows_where:``, ``sets:`` and ``derive:``.

A plan may say ``rows_where: "minutes_above_8c < 1440 and liner in ['foam', 'standard']"``. Plans come
from other people, so a filter must never be able to run code. That is why the text is read by the
hand-written tokenizer and recursive-descent parser below, into a tree of the few node types this
language has, and evaluated by walking that tree with numpy. Nothing here hands the text to the
Python interpreter: there is no ``eval``, ``exec`` or ``compile``, no ``ast`` module, no attribute
access, no indexing, and the only callable things are the five numeric functions in ``FUNCTIONS``.

Grammar (lowest precedence first; ``{}`` repeats, ``[]`` is optional)::

    filter      = or_expr END
    or_expr     = and_expr { "or" and_expr }
    and_expr    = not_expr { "and" not_expr }
    not_expr    = "not" not_expr | comparison
    comparison  = sum [ ("==" | "!=" | "<" | "<=" | ">" | ">=") sum
                      | "in" list | "not" "in" list ]        # at most one: no chains
    sum         = product { ("+" | "-") product }
    product     = unary { ("*" | "/") unary }
    unary       = "-" unary | primary
    primary     = NUMBER | STRING | "true" | "false" | column
                | FUNCTION "(" or_expr ")" | "(" or_expr ")"
    list        = "[" item { "," item } "]"
    item        = [ "-" ] NUMBER | STRING | "true" | "false"
    column      = NAME | "`" any characters but a backtick "`"

Types are checked twice: once while parsing, for everything that does not depend on the data
(``'a' + 1`` fails at once), and again at evaluation, when the dtype of every column is known.
Missing values (NaN, NaT, and anything in a text column that is not a string) never satisfy a
comparison: ``x != 3`` and ``x not in [3]`` are False where ``x`` is missing, as is ``x == 3``.
"""

from __future__ import annotations

import datetime
import difflib
import string
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import Any, Literal, NamedTuple

import numpy as np

from planrunner.errors import ExpressionError

MAX_LENGTH = 2000
"""Longest filter text accepted, in characters. A filter is a short condition; a limit keeps every
step of the parser bounded no matter what a plan contains."""

MAX_DEPTH = 40
"""Deepest nesting accepted: each open parenthesis, function call, ``not`` and unary ``-`` is one
level. The parser and the evaluator recurse once per level, so this keeps them far from Python's
recursion limit (a RecursionError must never escape)."""

Kind = Literal["number", "bool", "text", "date"]
"""What a value holds. ``None`` in its place means "not known yet" (a column, while parsing)."""

FUNCTIONS: dict[str, Callable[[Any], Any]] = {
    "abs": np.abs,
    "exp": np.exp,
    "log": np.log,
    "round": np.round,  # to the nearest integer, ties to even (numpy's rule)
    "sqrt": np.sqrt,
}
"""The only functions a filter may call: pure, numeric and elementwise."""

KEYWORDS = frozenset({"and", "or", "not", "in", "true", "false"})

_NAME_START = frozenset(string.ascii_letters + "_")
_NAME_PART = _NAME_START | frozenset(string.digits)
_DIGITS = frozenset(string.digits)
_SPACE = frozenset(" \t\r\n")
_COMPARISONS = ("==", "!=", "<=", ">=", "<", ">")  # two-character operators first when scanning
_SINGLE_OPERATORS = frozenset("<>+-*/()[],")
_NUMERIC: frozenset[str] = frozenset({"number", "bool"})  # true/false take part in sums as 1/0

_KIND_PHRASE: dict[str, str] = {
    "number": "a number",
    "bool": "true/false",
    "text": "text",
    "date": "a date",
}

_CONDITION_HINT = "make it a condition with a comparison, for example > 0 or == 'value'"
_FUNCTION_LIST = ", ".join(sorted(FUNCTIONS))

_COMPARE_UFUNCS: dict[str, Callable[[Any, Any], Any]] = {
    "==": np.equal,
    "!=": np.not_equal,
    "<": np.less,
    "<=": np.less_equal,
    ">": np.greater,
    ">=": np.greater_equal,
}
_ARITHMETIC_UFUNCS: dict[str, Callable[[Any, Any], Any]] = {
    "+": np.add,
    "-": np.subtract,
    "*": np.multiply,
    "/": np.true_divide,
}


class _Problem(Exception):
    """A user error found deep inside the tokenizer, parser or evaluator.

    The nodes do not know the filter text, so they raise this; `parse_expression` and
    `Expression.evaluate` turn it into an `ExpressionError` that carries the text.
    """

    def __init__(self, message: str, position: int, hint: str | None = None, rows: tuple[int, ...] = ()):
        super().__init__(message)
        self.message = message
        self.position = position
        self.hint = hint
        self.rows = rows

    def to_error(self, text: str) -> ExpressionError:
        """The public error, with the position repeated in the message for one-line output
        (counted from 1 there, as a person counts; `position` itself is 0-based)."""
        return ExpressionError(f"{self.message} at character {self.position + 1}",
                               position=self.position, text=text, hint=self.hint, rows=self.rows)


_UNDEFINED = {
    "log": ("log is defined only for numbers above 0", "exclude those rows first, e.g. y > 0 and log(y) < 2"),
    "sqrt": ("sqrt is defined only for numbers from 0 up", "exclude those rows first, e.g. y >= 0 and sqrt(y) < 2"),
    "exp": ("exp overflows (its value would exceed the largest double)", "compare the argument instead"),
    "/": ("division by zero (or a quotient beyond the largest double)", "exclude the rows whose divisor is 0 "
          "first, e.g. d != 0 and x / d > 1"),
}


def _defined(value: Any, operator: str, position: int, *operands: Any) -> Any:
    """A number every row can compare with: a result outside a function's domain (NaN) or beyond the
    doubles (infinite) would make comparisons quietly false or true, so it is an error naming rows.
    Only results made non-finite here count: a missing (NaN) operand stays missing."""
    bad = ~np.isfinite(value)
    for operand in operands:
        bad = bad & np.isfinite(operand)
    if not np.any(bad):
        return value
    what, hint = _UNDEFINED.get(operator, (f"'{operator}' overflows (a value beyond the largest double)",
                                            "rescale the values, or compare them without arithmetic"))
    if np.ndim(bad) == 0:  # a constant part of the filter: every row alike
        raise _Problem(f"{what}, but not here", position, hint)
    rows = tuple(int(i) for i in np.flatnonzero(bad))
    raise _Problem(f"{what}, but not on {len(rows)} row(s)", position, hint, rows=rows)


# --------------------------------------------------------------------------------------------
# Tokenizer
# --------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class _Token:
    """One lexical unit. `source` is the exact text written, used in messages."""

    kind: Literal["number", "string", "name", "column", "keyword", "op", "end"]
    source: str
    value: Any  # float for numbers, the unquoted str for strings, names and columns
    position: int


def _tokenize(text: str) -> list[_Token]:
    """Split `text` into tokens, ending with an "end" token; one pass, so linear in the length."""
    tokens: list[_Token] = []
    i = 0
    while i < len(text):
        char = text[i]
        if char in _SPACE:
            i += 1
        elif char in _DIGITS:
            token = _read_number(text, i)
            tokens.append(token)
            i += len(token.source)
        elif char in _NAME_START:
            end = i + 1
            while end < len(text) and text[end] in _NAME_PART:
                end += 1
            word = text[i:end]
            tokens.append(_Token("keyword" if word in KEYWORDS else "name", word, word, i))
            i = end
        elif char in "'\"":
            token = _read_string(text, i)
            tokens.append(token)
            i += len(token.source)
        elif char == "`":
            token = _read_backticked(text, i)
            tokens.append(token)
            i += len(token.source)
        else:
            operator = _read_operator(text, i)
            tokens.append(_Token("op", operator, operator, i))
            i += len(operator)
    # The end sits right after the last visible character, so that "x >   " points just
    # after the ">" rather than at trailing spaces.
    tokens.append(_Token("end", "", None, len(text.rstrip(" \t\r\n"))))
    return tokens


def _read_number(text: str, start: int) -> _Token:
    """Read ``digits [. digits] [e [+-] digits]`` starting at `start`."""
    end = _skip_digits(text, start)
    if end < len(text) and text[end] == ".":
        if end + 1 < len(text) and text[end + 1] in _DIGITS:
            end = _skip_digits(text, end + 1)
        else:
            raise _Problem("a decimal point must be followed by digits", end,
                           "write the number like 2.0 or 2")
    if end < len(text) and text[end] in "eE":
        after = end + 1
        if after < len(text) and text[after] in "+-":
            after += 1
        if after < len(text) and text[after] in _DIGITS:
            end = _skip_digits(text, after)
        else:
            raise _Problem("the exponent of this number has no digits", end,
                           "write exponents like 1e-3")
    if end < len(text) and (text[end] in _NAME_PART or text[end] == "."):
        # "12abc" or "1.2.3": refuse rather than guess where one token ends.
        raise _Problem(f"unexpected character {text[end]!r} right after a number", end,
                       "put an operator or a space after the number")
    source = text[start:end]
    # float() of a valid decimal literal never fails; huge values become inf, which is fine.
    return _Token("number", source, float(source), start)


def _skip_digits(text: str, i: int) -> int:
    """Index of the first non-digit at or after `i`."""
    while i < len(text) and text[i] in _DIGITS:
        i += 1
    return i


def _read_string(text: str, start: int) -> _Token:
    """Read a quoted string; only ``\\'`` and ``\\"`` are escapes, so nothing is ambiguous."""
    quote = text[start]
    chars: list[str] = []
    i = start + 1
    while i < len(text):
        char = text[i]
        if char == quote:
            return _Token("string", text[start:i + 1], "".join(chars), start)
        if char == "\\":
            if i + 1 >= len(text):
                break  # a lone backslash at the very end: report the unclosed quote below
            if text[i + 1] not in "'\"":
                raise _Problem("unsupported escape in quoted text", i,
                               "only \\' and \\\" can be escaped inside quotes")
            chars.append(text[i + 1])
            i += 2
            continue
        chars.append(char)
        i += 1
    raise _Problem(f"unclosed quote {quote}", start, f"end the text with {quote}")


def _read_backticked(text: str, start: int) -> _Token:
    """Read a `` `column name` `` that may hold spaces or punctuation."""
    end = text.find("`", start + 1)
    if end == -1:
        raise _Problem("unclosed backtick `", start, "end the column name with `")
    if end == start + 1:
        raise _Problem("empty column name ``", start, "write the column name between the backticks")
    return _Token("column", text[start:end + 1], text[start + 1:end], start)


def _read_operator(text: str, i: int) -> str:
    """Read an operator or punctuation at `i`, or explain why the character is not one."""
    pair = text[i:i + 2]
    if pair in ("&&", "||"):
        raise _Problem(f"{pair!r} is not an operator", i, "use and / or")
    if pair == "**":
        raise _Problem("'**' is not an operator", i,
                       "there is no power operator; multiply, or use exp and log")
    if pair == "<>":
        raise _Problem("'<>' is not an operator", i, "use != to compare")
    for operator in _COMPARISONS:
        if text.startswith(operator, i):
            return operator
    char = text[i]
    if char in _SINGLE_OPERATORS:
        return char
    raise _Problem(f"unexpected character {char!r}", i, _character_hint(text, i))


def _character_hint(text: str, i: int) -> str:
    """Advice for a character the language does not use, chosen by what it was probably for."""
    char = text[i]
    if char == "=":
        if i + 1 < len(text) and text[i + 1] in "<>":
            return f"write {text[i + 1]}= (the = comes second)"
        return "use == to compare"
    if char == "!":
        return "use != to compare, or not to negate a condition"
    if char in "&|":
        return "use and / or"
    if char == ".":
        if i + 1 < len(text) and text[i + 1] in _DIGITS:
            return "write decimals with a digit before the point, e.g. 0.5"
        return ("names cannot contain '.' and there is no attribute access; "
                "quote unusual column names in backticks, e.g. `a.b`")
    if char in "{}":
        return "lists use square brackets, e.g. x in [1, 2]"
    if char.isalpha() or char.isdigit():
        return "names use only the letters A-Z, digits and _; quote other names in backticks"
    return ("a filter uses names, numbers, quoted text, comparisons, + - * /, "
            "and / or / not, in [...] and parentheses")


# --------------------------------------------------------------------------------------------
# Tree nodes
# --------------------------------------------------------------------------------------------

class _Value(NamedTuple):
    """An evaluated value: its kind and its data (a numpy array, numpy scalar, or str)."""

    kind: Kind
    data: Any


class _Node:
    """Base of the tree nodes.

    `position` is the character to point at when the node itself is at fault (an operator, or
    the start of a literal); `start` is where the node's text begins.
    """

    position: int

    @property
    def start(self) -> int:
        """Where this node's text begins."""
        return self.position

    def infer(self, kinds: Mapping[str, Kind]) -> Kind | None:
        """Check the types below this node and return its kind (None: depends on a column that
        is not in `kinds`, as while parsing)."""
        raise NotImplementedError

    def compute(self, env: Mapping[str, _Value]) -> _Value:
        """Evaluate; called only after `infer` has accepted the tree with the same columns."""
        raise NotImplementedError


@dataclass(frozen=True)
class _Constant(_Node):
    """A number, quoted text, true or false."""

    value: float | str | bool
    kind: Kind
    source: str
    position: int

    def infer(self, kinds: Mapping[str, Kind]) -> Kind | None:
        return self.kind

    def compute(self, env: Mapping[str, _Value]) -> _Value:
        if self.kind == "number":
            return _Value("number", np.float64(self.value))
        if self.kind == "bool":
            return _Value("bool", np.bool_(self.value))
        return _Value("text", self.value)


@dataclass(frozen=True)
class _Column(_Node):
    """A reference to a column by name."""

    name: str
    source: str
    position: int

    def infer(self, kinds: Mapping[str, Kind]) -> Kind | None:
        return kinds.get(self.name)

    def compute(self, env: Mapping[str, _Value]) -> _Value:
        return env[self.name]


@dataclass(frozen=True)
class _Arithmetic(_Node):
    """A chain ``a + b - c`` (or of ``*`` ``/``) kept flat, so long chains add no depth."""

    first: _Node
    rest: tuple[tuple[str, int, _Node], ...]  # (operator, its position, right operand)

    @property
    def position(self) -> int:  # type: ignore[override]
        return self.rest[0][1]

    @property
    def start(self) -> int:
        return self.first.start

    def infer(self, kinds: Mapping[str, Kind]) -> Kind | None:
        # The first operand is blamed on the first operator; every other on the one before it.
        operands = [(self.rest[0][0], self.rest[0][1], self.first), *self.rest]
        for operator, position, node in operands:
            _require_number(node, node.infer(kinds), operator, position)
        return "number"

    def compute(self, env: Mapping[str, _Value]) -> _Value:
        total = _as_float(self.first.compute(env))
        for operator, position, node in self.rest:
            operand = _as_float(node.compute(env))
            total = _defined(_ARITHMETIC_UFUNCS[operator](total, operand), operator, position, total, operand)
        return _Value("number", total)


@dataclass(frozen=True)
class _Negate(_Node):
    """Unary minus."""

    operand: _Node
    position: int

    def infer(self, kinds: Mapping[str, Kind]) -> Kind | None:
        _require_number(self.operand, self.operand.infer(kinds), "-", self.position)
        return "number"

    def compute(self, env: Mapping[str, _Value]) -> _Value:
        return _Value("number", np.negative(_as_float(self.operand.compute(env))))


@dataclass(frozen=True)
class _Call(_Node):
    """One of the allowed functions applied to one numeric argument."""

    name: str
    argument: _Node
    position: int

    def infer(self, kinds: Mapping[str, Kind]) -> Kind | None:
        kind = self.argument.infer(kinds)
        if kind is not None and kind not in _NUMERIC:
            raise _Problem(f"{self.name} needs a number, but got {_describe(self.argument, kind)}",
                           self.position, "functions work on numbers only")
        return "number"

    def compute(self, env: Mapping[str, _Value]) -> _Value:
        argument = _as_float(self.argument.compute(env))
        return _Value("number", _defined(FUNCTIONS[self.name](argument), self.name, self.position, argument))


@dataclass(frozen=True)
class _Compare(_Node):
    """``left <op> right`` for one of the six comparison operators."""

    operator: str
    left: _Node
    right: _Node
    position: int

    @property
    def start(self) -> int:
        return self.left.start

    def infer(self, kinds: Mapping[str, Kind]) -> Kind | None:
        _check_comparable(self.operator, self.position, self.left, self.left.infer(kinds),
                          self.right, self.right.infer(kinds))
        return "bool"

    def compute(self, env: Mapping[str, _Value]) -> _Value:
        return _Value("bool", _compare(self.operator, self.left, self.left.compute(env),
                                       self.right, self.right.compute(env)))


@dataclass(frozen=True)
class _Membership(_Node):
    """``operand in [items]`` or ``operand not in [items]``."""

    operand: _Node
    items: tuple[_Constant, ...]
    negated: bool
    position: int  # of "in", or of "not" in "not in"

    @property
    def start(self) -> int:
        return self.operand.start

    def infer(self, kinds: Mapping[str, Kind]) -> Kind | None:
        kind = self.operand.infer(kinds)
        for item in self.items:  # checks each item, so a bad date is pointed at exactly
            _check_comparable("==", self.position, self.operand, kind, item, item.kind)
        return "bool"

    def compute(self, env: Mapping[str, _Value]) -> _Value:
        value = self.operand.compute(env)
        # Lists are short (the text is at most MAX_LENGTH), so one == per item is cheap and
        # reuses exactly the rules of ==, including dates and missing values.
        found: Any = np.False_
        for item in self.items:
            found = found | _compare("==", self.operand, value, item, item.compute(env))
        if self.negated:
            # "not in" is False for a missing value, like every other comparison.
            return _Value("bool", ~found & ~_missing(value))
        return _Value("bool", found)


@dataclass(frozen=True)
class _Not(_Node):
    """``not condition``."""

    operand: _Node
    position: int

    def infer(self, kinds: Mapping[str, Kind]) -> Kind | None:
        _require_condition(self.operand, self.operand.infer(kinds), "'not' needs a condition")
        return "bool"

    def compute(self, env: Mapping[str, _Value]) -> _Value:
        return _Value("bool", np.logical_not(self.operand.compute(env).data))


@dataclass(frozen=True)
class _Logic(_Node):
    """A flat chain of ``and`` (or of ``or``): flat so that long chains add no depth."""

    operator: Literal["and", "or"]
    operands: tuple[_Node, ...]
    position: int  # of the first operator

    @property
    def start(self) -> int:
        return self.operands[0].start

    def infer(self, kinds: Mapping[str, Kind]) -> Kind | None:
        for node in self.operands:
            _require_condition(node, node.infer(kinds), f"'{self.operator}' joins conditions")
        return "bool"

    def compute(self, env: Mapping[str, _Value]) -> _Value:
        combine = np.logical_and if self.operator == "and" else np.logical_or
        result = self.operands[0].compute(env).data
        for node in self.operands[1:]:
            result = combine(result, node.compute(env).data)
        return _Value("bool", result)


# --------------------------------------------------------------------------------------------
# Type rules and the operations behind them
# --------------------------------------------------------------------------------------------

def _describe(node: _Node, kind: Kind) -> str:
    """How to name an operand in a message: as written if it is a column or literal."""
    if isinstance(node, (_Column, _Constant)):
        return f"{node.source} ({_KIND_PHRASE[kind]})"
    return _KIND_PHRASE[kind]


def _require_number(node: _Node, kind: Kind | None, operator: str, position: int) -> None:
    """Arithmetic needs numbers; say why text or dates cannot be used."""
    if kind is None or kind in _NUMERIC:
        return
    hint = ("dates can be compared, e.g. day >= '2024-01-31', but not used in arithmetic"
            if kind == "date" else
            "arithmetic works on numbers only; text can be compared with ==, != or in")
    raise _Problem(f"cannot use {operator} on {_describe(node, kind)}", position, hint)


def _require_condition(node: _Node, kind: Kind | None, what: str) -> None:
    """and / or / not take conditions (comparisons, true/false columns, true, false)."""
    if kind is not None and kind != "bool":
        raise _Problem(f"{what}, but {_describe(node, kind)} is not one", node.start,
                       _CONDITION_HINT)


def _check_root(root: _Node, kind: Kind | None) -> None:
    """A filter keeps or drops each row, so the whole expression must be a condition."""
    if kind is not None and kind != "bool":
        raise _Problem(f"the filter must be a condition (true or false for each row), "
                       f"but it gives {_KIND_PHRASE[kind]}", root.position, _CONDITION_HINT)


def _check_comparable(operator: str, position: int, left: _Node, left_kind: Kind | None,
                      right: _Node, right_kind: Kind | None) -> None:
    """Raise unless ``left <operator> right`` means something for these kinds."""
    if left_kind is None or right_kind is None:
        return  # a column whose type is known only at evaluation
    if left_kind in _NUMERIC and right_kind in _NUMERIC:
        return
    if "date" in (left_kind, right_kind):
        if left_kind == right_kind:
            return
        other, other_kind = (right, right_kind) if left_kind == "date" else (left, left_kind)
        if other_kind == "text" and isinstance(other, _Constant):
            _parse_date(other)  # quoted text next to a date is read as a date, or fails here
            return
        raise _Problem(f"cannot compare {_describe(left, left_kind)} with "
                       f"{_describe(right, right_kind)}", position,
                       "compare dates with a quoted date 'YYYY-MM-DD' or another date column")
    if left_kind == "text" and right_kind == "text":
        if operator in ("==", "!="):
            return
        raise _Problem(f"cannot use {operator} on text", position,
                       "text can only be compared with ==, != or in")
    if "bool" in (left_kind, right_kind):
        hint = "write true and false without quotes"
    else:
        hint = "quote text values ('5') but not numbers; check which kind the column holds"
    raise _Problem(f"cannot compare {_describe(left, left_kind)} with "
                   f"{_describe(right, right_kind)}", position, hint)


def _parse_date(literal: _Constant) -> np.datetime64:
    """Read quoted text as an ISO date ``YYYY-MM-DD``, strictly (no times, no other formats)."""
    text = str(literal.value)
    digits_at = (0, 1, 2, 3, 5, 6, 8, 9)
    if len(text) == 10 and text[4] == "-" and text[7] == "-" and all(
            text[i] in _DIGITS for i in digits_at):
        try:
            day = datetime.date(int(text[:4]), int(text[5:7]), int(text[8:]))
        except ValueError:
            pass  # e.g. month 13 or 31 February: fall through to the same error
        else:
            return np.datetime64(day.isoformat(), "D")
    raise _Problem(f"{literal.source} is not a date", literal.position,
                   "write dates as 'YYYY-MM-DD', e.g. '2024-03-31'")


def _as_float(value: _Value) -> Any:
    """Numbers and true/false as float64, so all arithmetic follows one set of rules."""
    return np.asarray(value.data, dtype=np.float64)


def _missing(value: _Value) -> Any:
    """Where `value` is missing: NaN, NaT, or None in a (prepared) text column."""
    if value.kind == "number":
        return np.isnan(value.data)
    if value.kind == "date":
        return np.isnat(value.data)
    if value.kind == "text":
        if isinstance(value.data, str):
            return np.False_
        return np.fromiter((item is None for item in value.data), dtype=bool,
                           count=len(value.data))
    return np.False_  # numpy booleans cannot be missing


def _compare(operator: str, left: _Node, left_value: _Value,
             right: _Node, right_value: _Value) -> Any:
    """Apply a comparison that `_check_comparable` accepted; missing values give False."""
    if "date" in (left_value.kind, right_value.kind):
        a = left_value.data if left_value.kind == "date" else _parse_date(_constant(left))
        b = right_value.data if right_value.kind == "date" else _parse_date(_constant(right))
        missing = np.isnat(a) | np.isnat(b)
    elif left_value.kind == "text":
        # As object arrays (a literal becomes a 0-d one) the values compare element by element
        # with Python's str ==, on every numpy version. None == None would be True, hence the
        # missing mask below.
        a = np.asarray(left_value.data, dtype=object)
        b = np.asarray(right_value.data, dtype=object)
        missing = _missing(left_value) | _missing(right_value)
    else:
        a, b = _as_float(left_value), _as_float(right_value)
        missing = np.isnan(a) | np.isnan(b)
    result = np.asarray(_COMPARE_UFUNCS[operator](a, b), dtype=bool)
    return result & ~missing


def _constant(node: _Node) -> _Constant:
    """The quoted-text literal next to a date (guaranteed by `_check_comparable`)."""
    assert isinstance(node, _Constant)
    return node


# --------------------------------------------------------------------------------------------
# Parser
# --------------------------------------------------------------------------------------------

class _Parser:
    """Recursive descent over the token list; one method per grammar rule (see module doc)."""

    def __init__(self, tokens: list[_Token]):
        self.tokens = tokens
        self.index = 0
        self.depth = 0
        self.first_seen: dict[str, int] = {}  # column name -> position of its first mention

    # --- helpers ---------------------------------------------------------------------------

    def peek(self, offset: int = 0) -> _Token:
        """The current token (or one further on); the end token repeats forever."""
        return self.tokens[min(self.index + offset, len(self.tokens) - 1)]

    def advance(self) -> _Token:
        """Consume and return the current token."""
        token = self.peek()
        self.index = min(self.index + 1, len(self.tokens) - 1)
        return token

    def at(self, kind: str, source: str | None = None, offset: int = 0) -> bool:
        """Whether the current token (or one further on) is of this kind and text."""
        token = self.peek(offset)
        return token.kind == kind and (source is None or token.source == source)

    def enter(self, token: _Token) -> None:
        """One level deeper; refuse before Python's own recursion limit could be reached."""
        self.depth += 1
        if self.depth > MAX_DEPTH:
            raise _Problem(f"the filter is nested too deeply (more than {MAX_DEPTH} levels)",
                           token.position,
                           "simplify it: fewer nested parentheses, calls, not or minus signs")

    def leave(self) -> None:
        """Back up one level."""
        self.depth -= 1

    def previous(self) -> _Token | None:
        """The token just consumed, if any."""
        return self.tokens[self.index - 1] if self.index > 0 else None

    # --- grammar rules ---------------------------------------------------------------------

    def parse(self) -> _Node:
        """filter = or_expr END"""
        if self.at("end"):
            raise _Problem("the filter is empty", 0, "write a condition, e.g. dose > 0")
        node = self.parse_or()
        if not self.at("end"):
            raise self.trailing(self.peek())
        return node

    def parse_or(self) -> _Node:
        """or_expr = and_expr { "or" and_expr }"""
        operands = [self.parse_and()]
        first_position = self.peek().position
        while self.at("keyword", "or"):
            self.advance()
            operands.append(self.parse_and())
        return operands[0] if len(operands) == 1 else _Logic("or", tuple(operands), first_position)

    def parse_and(self) -> _Node:
        """and_expr = not_expr { "and" not_expr }"""
        operands = [self.parse_not()]
        first_position = self.peek().position
        while self.at("keyword", "and"):
            self.advance()
            operands.append(self.parse_not())
        return operands[0] if len(operands) == 1 else _Logic("and", tuple(operands),
                                                             first_position)

    def parse_not(self) -> _Node:
        """not_expr = "not" not_expr | comparison"""
        if self.at("keyword", "not"):
            token = self.advance()
            self.enter(token)
            operand = self.parse_not()
            self.leave()
            return _Not(operand, token.position)
        return self.parse_comparison()

    def parse_comparison(self) -> _Node:
        """comparison = sum [ op sum | "in" list | "not" "in" list ] -- never chained."""
        left = self.parse_sum()
        node = self.comparison_tail(left)
        if node is not left and self.starts_comparison():
            raise _Problem("comparisons cannot be chained", self.peek().position,
                           "join them with and, e.g. a < b and b < c")
        return node

    def starts_comparison(self) -> bool:
        """Whether a comparison operator, "in" or "not in" comes next."""
        token = self.peek()
        return ((token.kind == "op" and token.source in _COMPARISONS)
                or self.at("keyword", "in")
                or (self.at("keyword", "not") and self.at("keyword", "in", offset=1)))

    def comparison_tail(self, left: _Node) -> _Node:
        """The comparison after `left`, if one follows; otherwise `left` itself."""
        token = self.peek()
        if token.kind == "op" and token.source in _COMPARISONS:
            self.advance()
            return _Compare(token.source, left, self.parse_sum(), token.position)
        if self.at("keyword", "in"):
            self.advance()
            return _Membership(left, self.parse_list(), False, token.position)
        if self.at("keyword", "not") and self.at("keyword", "in", offset=1):
            self.advance()
            self.advance()
            return _Membership(left, self.parse_list(), True, token.position)
        return left

    def parse_sum(self) -> _Node:
        """sum = product { ("+" | "-") product }"""
        first = self.parse_product()
        rest: list[tuple[str, int, _Node]] = []
        while self.at("op", "+") or self.at("op", "-"):
            token = self.advance()
            rest.append((token.source, token.position, self.parse_product()))
        return _Arithmetic(first, tuple(rest)) if rest else first

    def parse_product(self) -> _Node:
        """product = unary { ("*" | "/") unary }"""
        first = self.parse_unary()
        rest: list[tuple[str, int, _Node]] = []
        while self.at("op", "*") or self.at("op", "/"):
            token = self.advance()
            rest.append((token.source, token.position, self.parse_unary()))
        return _Arithmetic(first, tuple(rest)) if rest else first

    def parse_unary(self) -> _Node:
        """unary = "-" unary | primary"""
        if self.at("op", "-"):
            token = self.advance()
            self.enter(token)
            operand = self.parse_unary()
            self.leave()
            return _Negate(operand, token.position)
        return self.parse_primary()

    def parse_primary(self) -> _Node:
        """A literal, a column, a function call or a parenthesised expression."""
        token = self.peek()
        if token.kind == "number":
            self.advance()
            return _Constant(token.value, "number", token.source, token.position)
        if token.kind == "string":
            self.advance()
            return _Constant(token.value, "text", token.source, token.position)
        if self.at("keyword", "true") or self.at("keyword", "false"):
            self.advance()
            return _Constant(token.source == "true", "bool", token.source, token.position)
        if token.kind == "name" and self.at("op", "(", offset=1):
            return self.parse_call()
        if token.kind in ("name", "column"):
            self.advance()
            self.first_seen.setdefault(token.value, token.position)
            return _Column(token.value, token.source, token.position)
        if self.at("op", "("):
            self.advance()
            self.enter(token)
            inner = self.parse_or()
            self.expect_close(token)
            self.leave()
            return inner
        if self.at("op", "["):
            raise _Problem("a list [...] can only follow in or not in", token.position,
                           "write it like x in [1, 2]")
        raise self.missing_value(token)

    def parse_call(self) -> _Node:
        """FUNCTION "(" or_expr ")" -- exactly one argument, and only the allowed names."""
        name = self.advance()
        if name.value not in FUNCTIONS:
            raise _Problem(f"unknown function {name.source!r}", name.position,
                           f"the allowed functions are {_FUNCTION_LIST}")
        opening = self.advance()
        self.enter(opening)
        if self.at("op", ")"):
            raise _Problem(f"{name.source}() needs a value between the parentheses",
                           self.peek().position, f"write it like {name.source}(x)")
        argument = self.parse_or()
        if self.at("op", ","):
            raise _Problem(f"{name.source} takes exactly one value", self.peek().position,
                           f"write it like {name.source}(x)")
        self.expect_close(opening)
        self.leave()
        return _Call(name.value, argument, name.position)

    def expect_close(self, opening: _Token) -> None:
        """Consume the ")" matching `opening`, or say what is wrong."""
        if self.at("op", ")"):
            self.advance()
            return
        token = self.peek()
        if token.kind == "end":
            raise _Problem("unclosed '('", opening.position, "add the missing ')'")
        raise _Problem(f"expected ')' but found {_name_token(token)}", token.position,
                       "check the parentheses, or join conditions with and / or")

    def parse_list(self) -> tuple[_Constant, ...]:
        """list = "[" item { "," item } "]" -- literals of a single kind."""
        opening = self.peek()
        if not self.at("op", "["):
            raise _Problem(f"expected a list in square brackets after in, but found "
                           f"{_name_token(opening)}", opening.position,
                           "write the values like x in [1, 2]")
        self.advance()
        if self.at("op", "]"):
            raise _Problem("the list is empty", opening.position, "list at least one value")
        items: list[_Constant] = []
        while True:
            items.append(self.parse_item(opening))
            if self.at("op", "]"):
                self.advance()
                break
            if self.at("op", ","):
                self.advance()
                continue
            token = self.peek()
            if token.kind == "end":
                raise _Problem("unclosed '['", opening.position, "add the missing ']'")
            raise _Problem(f"expected ',' or ']' in the list but found {_name_token(token)}",
                           token.position, "separate the values with commas")
        for item in items[1:]:
            if item.kind != items[0].kind:
                raise _Problem(f"the list mixes {_KIND_PHRASE[items[0].kind]} and "
                               f"{_KIND_PHRASE[item.kind]}", item.position,
                               "all values in a list must be of one kind")
        return tuple(items)

    def parse_item(self, opening: _Token) -> _Constant:
        """item = [ "-" ] NUMBER | STRING | "true" | "false" """
        token = self.peek()
        if token.kind == "op" and token.source == "-" and self.at("number", offset=1):
            self.advance()
            number = self.advance()
            return _Constant(-number.value, "number", f"-{number.source}", token.position)
        if token.kind in ("number", "string") or self.at("keyword", "true") \
                or self.at("keyword", "false"):
            return self.parse_primary()  # type: ignore[return-value]  # always a _Constant
        if token.kind == "end":
            raise _Problem("unclosed '['", opening.position, "add the missing ']'")
        raise _Problem(f"a list can hold only numbers, quoted text or true/false, "
                       f"not {_name_token(token)}", token.position,
                       "names and calculations are not allowed inside a list")

    # --- error reports ---------------------------------------------------------------------

    def missing_value(self, token: _Token) -> _Problem:
        """A value was expected at `token`."""
        if token.kind == "end":
            previous = self.previous()
            after = f" after {_name_token(previous)}" if previous else ""
            return _Problem("the filter ends too early", token.position,
                            f"something is missing{after}")
        if token.kind == "op" and token.source == ")":
            return _Problem("unexpected ')'", token.position, "check the parentheses")
        if token.kind == "keyword" and token.source == "not":
            return _Problem("unexpected 'not'", token.position,
                            "put not in front of the whole comparison, or in parentheses: "
                            "a == (not b)")
        return _Problem(f"unexpected {_name_token(token)}", token.position,
                        "a value or a condition is missing before it")

    def trailing(self, token: _Token) -> _Problem:
        """Something is left after a complete filter."""
        previous = self.previous()
        if previous and previous.kind == "name" and previous.source.lower() in KEYWORDS:
            token = previous  # "x > 1 AND y": the real problem is AND, not y
        if token.kind == "name" and token.source.lower() in KEYWORDS:
            return _Problem(f"unexpected {_name_token(token)}", token.position,
                            f"keywords are written in lower case: {token.source.lower()}")
        if token.kind == "op" and token.source == ")":
            return _Problem("unexpected ')'", token.position, "check the parentheses")
        if token.kind == "op" and token.source in ",]":
            return _Problem(f"unexpected {_name_token(token)}", token.position,
                            "',' and ']' belong inside lists and function calls")
        if self.at("keyword", "not"):
            return _Problem("unexpected 'not'", token.position,
                            "not goes in front of a condition; use not in [...] for lists")
        return _Problem(f"unexpected {_name_token(token)}", token.position,
                        "join conditions with and / or, or add the missing operator")


def _name_token(token: _Token) -> str:
    """How a token is named in a message."""
    if token.kind == "end":
        return "the end of the filter"
    if token.kind == "name":
        return f"name '{token.source}'"
    if token.kind == "column":
        return f"column {token.source}"
    if token.kind == "number":
        return f"number {token.source}"
    if token.kind == "string":
        return f"text {token.source}"
    return f"'{token.source}'"


def _written_name(name: str) -> str:
    """A column name as it must be written in a filter."""
    plain = (name and name[0] in _NAME_START and all(c in _NAME_PART for c in name)
             and name not in KEYWORDS)
    return name if plain else f"`{name}`"


# --------------------------------------------------------------------------------------------
# Public API
# --------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class Expression:
    """A parsed row filter. Build it with `parse_expression`.

    `columns` are the names the filter refers to; `evaluate` needs (at least) those.
    """

    text: str
    columns: frozenset[str]
    _root: _Node | None = field(default=None, repr=False, compare=False)
    _first_seen: tuple[tuple[str, int], ...] = field(default=(), repr=False, compare=False)

    def __post_init__(self) -> None:
        # Constructed directly rather than by parse_expression: parse the text now, so that an
        # Expression always holds a checked tree.
        if self._root is None:
            parsed = parse_expression(self.text)
            if parsed.columns != self.columns:
                raise ValueError(f"columns {sorted(self.columns)} do not match the filter, "
                                 f"which uses {sorted(parsed.columns)}")
            object.__setattr__(self, "_root", parsed._root)
            object.__setattr__(self, "_first_seen", parsed._first_seen)

    def evaluate(self, columns: Mapping[str, np.ndarray]) -> np.ndarray:
        """Which rows the filter keeps: a boolean array with one value per row.

        `columns` maps names to 1-D arrays of equal length. Numbers are int, float or bool
        dtypes; text is an object or str dtype (non-strings in it count as missing); dates are
        datetime64. Raises `ExpressionError` for unknown columns and type mismatches, and
        ValueError if the arrays themselves are malformed (a caller's bug, not the plan's).
        """
        try:
            return self._evaluate(columns)
        except _Problem as problem:
            raise problem.to_error(self.text) from None

    def _evaluate(self, columns: Mapping[str, np.ndarray]) -> np.ndarray:
        assert self._root is not None  # set in __post_init__
        env, rows = _environment(self._first_seen, columns)
        kind = self._root.infer({name: value.kind for name, value in env.items()})
        _check_root(self._root, kind)
        # Division by zero, log(0), sqrt(-1) give inf/NaN by IEEE rules; `_defined` turns each into
        # an error naming the rows, so numpy's own warnings about them are not needed.
        with np.errstate(all="ignore"):
            value = self._root.compute(env)
        return np.broadcast_to(np.asarray(value.data, dtype=bool), (rows,)).copy()


def parse_expression(text: str) -> Expression:
    """Parse a row filter, checking everything that does not depend on the data.

    Raises `ExpressionError` (with the 0-based character position of the problem) for anything
    that is not a valid filter; never any other exception, and never runs any code from `text`.
    """
    parser, root = _parse(text, "filter", "condition",
                          "shorten it; long lists of values may belong in a derived column",
                          lambda root: _check_root(root, root.infer({})))
    return Expression(text, frozenset(parser.first_seen), root,
                      tuple(parser.first_seen.items()))


def _parse(text: object, what: str, quoted: str, too_long_hint: str,
           check: Callable[[_Node], None]) -> tuple[_Parser, _Node]:
    """Tokenize and parse `text` (a `what`: filter or expression), then run `check` on the tree;
    every problem becomes an `ExpressionError` carrying the text."""
    if not isinstance(text, str):
        raise ExpressionError(f"the {what} must be text, not {type(text).__name__}",
                              position=0, text=str(text), hint=f"put the {quoted} in quotes")
    try:
        if len(text) > MAX_LENGTH:
            raise _Problem(f"the {what} is longer than {MAX_LENGTH} characters", MAX_LENGTH, too_long_hint)
        parser = _Parser(_tokenize(text))
        root = parser.parse()
        check(root)
    except _Problem as problem:
        raise problem.to_error(text) from None
    return parser, root


def _unknown_column(name: str, position: int, columns: Mapping[str, Any]) -> _Problem:
    """The error for a column that the data do not have, with the closest names."""
    available = sorted(str(key) for key in columns)
    close = difflib.get_close_matches(name, available, n=3)
    if name.lower() in KEYWORDS:
        hint = f"keywords are written in lower case: {name.lower()}"
    elif close:
        hint = "did you mean " + " or ".join(_written_name(c) for c in close) + "?"
    elif available:
        shown = ", ".join(_written_name(c) for c in available[:10])
        hint = f"the columns are {shown}" + (", ..." if len(available) > 10 else "")
    else:
        hint = "the data have no columns"
    return _Problem(f"unknown column {_written_name(name)}", position, hint)


def _prepare_column(name: str, position: int, array: np.ndarray) -> _Value:
    """Classify a column by dtype and put it in the one form the operations expect."""
    code = array.dtype.kind
    if code == "b":
        return _Value("bool", array)
    if code in "iuf":
        # One numeric type for everything: no unsigned wrap-around, no integer overflow, and
        # NaN available as "missing". (Integers beyond 2**53 lose exactness.)
        return _Value("number", array.astype(np.float64))
    if code == "M":
        return _Value("date", array)
    if code == "U":
        return _Value("text", array.astype(object))
    if code == "O":
        # Anything that is not a string (None, NaN, pandas' NA, ...) becomes None = missing, so
        # that no foreign __eq__ ever runs during a comparison.
        cleaned = np.empty(len(array), dtype=object)
        cleaned[:] = [item if isinstance(item, str) else None for item in array]
        return _Value("text", cleaned)
    raise _Problem(f"column {_written_name(name)} holds values of type {array.dtype}, "
                   f"which filters cannot use", position,
                   "filters work on numbers, true/false, text and dates")


# --------------------------------------------------------------------------------------------
# Derived columns: the same language giving a value per row
# --------------------------------------------------------------------------------------------

DERIVED_KINDS: dict[str, Kind] = {"number": "number", "integer": "number", "boolean": "bool",
                                  "category": "text", "text": "text", "date": "date"}
"""The kind a filter or derivation sees for each declared column type."""


@dataclass(frozen=True)
class ValueExpression:
    """A parsed derivation (``derive:`` in a dataset): a number or true/false per row.

    The same tokenizer, parser and tree as a row filter, so it can never run code; only the root
    is not required to be a condition. Build it with `parse_value_expression`.
    """

    text: str
    columns: frozenset[str]
    _root: _Node = field(repr=False, compare=False)
    _first_seen: tuple[tuple[str, int], ...] = field(default=(), repr=False, compare=False)

    def kind(self, kinds: Mapping[str, Kind]) -> Kind | None:
        """The kind of the result given the kinds of the columns it names (ExpressionError when
        the types do not fit, e.g. text in a sum)."""
        try:
            return self._root.infer(kinds)
        except _Problem as problem:
            raise problem.to_error(self.text) from None

    def evaluate(self, columns: Mapping[str, np.ndarray]) -> np.ndarray:
        """One value per row: float64 for a number, bool for a condition. A result that is not a
        finite number (log(0), a quotient by zero, an overflow) raises `ExpressionError` naming the
        rows (0-based indices into the arrays), never a silent NaN or infinity."""
        try:
            env, rows = _environment(self._first_seen, columns)
            kind = self._root.infer({name: value.kind for name, value in env.items()})
            if kind not in _NUMERIC:
                raise _Problem(f"a derived column must be a number or true/false, but this gives "
                               f"{_KIND_PHRASE[kind] if kind else 'nothing'}", self._root.position,
                               "compute a number (e.g. after - before) or a condition (e.g. dose > 0)")
            with np.errstate(all="ignore"):
                value = self._root.compute(env)
            if kind == "bool":
                return np.broadcast_to(np.asarray(value.data, dtype=bool), (rows,)).copy()
            data = np.broadcast_to(np.asarray(value.data, dtype=np.float64), (rows,)).copy()
            bad = ~np.isfinite(data)
            if bad.any():  # a constant beyond the doubles (1e999) or a missing value of a column
                raise _Problem(f"the value is not a finite number on {int(bad.sum())} row(s)",
                               self._root.start, "exclude those rows first, or rescale the values",
                               rows=tuple(int(i) for i in np.flatnonzero(bad)))
            return data
        except _Problem as problem:
            raise problem.to_error(self.text) from None


def parse_value_expression(text: str) -> ValueExpression:
    """Parse a derivation, checking everything that does not depend on the data (as
    `parse_expression` does, without requiring a condition)."""
    parser, root = _parse(text, "expression", "expression", "split it into several derived columns",
                          _check_value_root)
    return ValueExpression(text, frozenset(parser.first_seen), root, tuple(parser.first_seen.items()))


def _check_value_root(root: _Node) -> None:
    """A derivation must give a number or true/false (a derived column is never text or a date)."""
    kind = root.infer({})
    if kind is not None and kind not in _NUMERIC:
        raise _Problem(f"a derived column must be a number or true/false, but this gives {_KIND_PHRASE[kind]}",
                       root.position, "compute a number (e.g. after - before) or a condition (e.g. dose > 0)")


def _environment(first_seen: tuple[tuple[str, int], ...],
                 columns: Mapping[str, np.ndarray]) -> tuple[dict[str, _Value], int]:
    """The prepared columns an expression names, and the number of rows."""
    env: dict[str, _Value] = {}
    rows: int | None = None
    for name, position in first_seen:
        if name not in columns:
            raise _unknown_column(name, position, columns)
        array = np.asarray(columns[name])
        if array.ndim != 1:
            raise ValueError(f"column {name!r} must be a 1-D array, not {array.ndim}-D")
        if rows is not None and len(array) != rows:
            raise ValueError(f"column {name!r} has {len(array)} rows, others have {rows}")
        rows = len(array)
        env[name] = _prepare_column(name, position, array)
    if rows is None:  # no column named: one value per row anyway
        rows = len(next(iter(columns.values()))) if columns else 0
    return env, rows
