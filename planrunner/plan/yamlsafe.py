"""Safe YAML loading with positions.

A plan may come from someone else, so loading is deliberately narrower than YAML: no tags (which
in some loaders construct objects), no anchors or aliases (which can expand without bound), no
duplicate keys (YAML loaders normally keep the last silently, which would make the plan that runs
differ from the plan that was read). Every node's line and column is kept so that schema errors
can point into the file.
"""

from __future__ import annotations

import re
import unicodedata
from dataclasses import dataclass
from typing import Any

import yaml

from planrunner.errors import PlanError

Path_ = tuple[str | int, ...]

MAX_PLAN_BYTES = 1_000_000
MAX_DEPTH = 30

_SCALAR_LOADER = yaml.SafeLoader("")
_PLAIN_TAGS = {
    "tag:yaml.org,2002:str",
    "tag:yaml.org,2002:int",
    "tag:yaml.org,2002:float",
    "tag:yaml.org,2002:bool",
    "tag:yaml.org,2002:null",
}


# YAML 1.1 (which PyYAML follows) reads 017 as octal 15, 0x1F as 31, 0b11 as 3 and 1:30 as
# base 60 (90); YAML 1.2 and every reader of a plan would not. A plan must not depend on that.
_SURPRISING_NUMBER = re.compile(r"[-+]?(0[0-9_]+(\.[0-9_]*)?"  # leading zero (octal)
                                r"|0[xXoObB][0-9a-fA-F_]+"  # base prefix
                                r"|[0-9][0-9_]*(:[0-5]?[0-9])+(\.[0-9_]*)?)")  # base 60


_OPENERS = (yaml.BlockMappingStartToken, yaml.BlockSequenceStartToken, yaml.FlowMappingStartToken,
            yaml.FlowSequenceStartToken)
_CLOSERS = (yaml.BlockEndToken, yaml.FlowMappingEndToken, yaml.FlowSequenceEndToken)


@dataclass(frozen=True)
class Position:
    line: int  # 1-based
    column: int  # 1-based


@dataclass(frozen=True)
class LoadedYaml:
    data: Any
    values: dict[Path_, Position]  # where each value starts
    keys: dict[Path_, Position]  # where each mapping key starts (for "unknown key" errors)

    def position(self, path: Path_, *, key: bool = False) -> Position:
        """The best known position for `path`: the node itself, else its nearest ancestor."""
        table = self.keys if key else self.values
        probe = tuple(path)
        while probe:
            if probe in table:
                return table[probe]
            if not key and probe in self.keys:
                return self.keys[probe]
            probe = probe[:-1]
        return self.values.get((), Position(1, 1))


def _pos(mark: yaml.Mark) -> Position:
    return Position(mark.line + 1, mark.column + 1)


def load_yaml(text: str, filename: str) -> LoadedYaml:
    """Parse `text` into plain dicts, lists and scalars, refusing what a plan never needs."""
    if len(text.encode("utf-8")) > MAX_PLAN_BYTES:
        raise PlanError(f"the plan is larger than {MAX_PLAN_BYTES} bytes", where=filename,
                        hint="a plan holds settings, not data; put data in the files it names")
    # one Unicode form (NFC) for names, levels and filters, as for the data files
    text = unicodedata.normalize("NFC", text)
    try:
        depth = 0
        for token in yaml.scan(text, Loader=yaml.SafeLoader):
            # Count nesting on the tokens, before composing: the composer recurses once per level
            # and a plan of a million '[' would exhaust Python's stack long before _build could
            # refuse it.
            if isinstance(token, _OPENERS):
                depth += 1
                if depth > MAX_DEPTH + 1:
                    p = _pos(token.start_mark)
                    raise PlanError("the plan is nested too deeply", where=f"{filename}:{p.line}:{p.column}",
                                    hint=f"a plan needs no more than {MAX_DEPTH} levels")
            elif isinstance(token, _CLOSERS):
                depth -= 1
            if isinstance(token, (yaml.TagToken, yaml.AnchorToken, yaml.AliasToken)):
                kind = {yaml.TagToken: "tags (!...)", yaml.AnchorToken: "anchors (&...)",
                        yaml.AliasToken: "aliases (*...)"}[type(token)]
                p = _pos(token.start_mark)
                raise PlanError(f"YAML {kind} are not allowed in a plan",
                                where=f"{filename}:{p.line}:{p.column}",
                                hint="write the value out in full")
        root = yaml.compose(text, Loader=yaml.SafeLoader)
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark or exc.context_mark
        where = f"{filename}:{mark.line + 1}:{mark.column + 1}" if mark else filename
        raise PlanError(f"not valid YAML: {exc.problem or exc.context}", where=where,
                        hint="check indentation, colons and quotes near this place") from None
    except yaml.reader.ReaderError as exc:  # a character YAML does not allow (NUL, other controls)
        before = text[:exc.position]
        line, column = before.count("\n") + 1, exc.position - (before.rfind("\n") + 1) + 1
        code = exc.character if isinstance(exc.character, int) else ord(str(exc.character)[:1] or "\0")
        raise PlanError(f"not valid YAML: the character U+{code:04X} is not allowed in a plan",
                        where=f"{filename}:{line}:{column}", hint="remove the control character") from None
    except yaml.YAMLError as exc:
        raise PlanError(f"not valid YAML: {exc}", where=filename) from None
    if root is None:
        raise PlanError("the plan file is empty", where=f"{filename}:1:1",
                        hint="start from one of the plans in plans/")
    values: dict[Path_, Position] = {}
    keys: dict[Path_, Position] = {}
    data = _build(root, (), values, keys, filename)
    return LoadedYaml(data=data, values=values, keys=keys)


def dotted(path: Path_) -> str:
    """('analyses', 0, 'groups', 'by') -> 'analyses[0].groups.by'."""
    out = ""
    for part in path:
        out += f"[{part}]" if isinstance(part, int) else (f".{part}" if out else str(part))
    return out or "(plan)"


def _build(node: yaml.Node, path: Path_, values: dict, keys: dict, filename: str) -> Any:
    # a quoted scalar's text starts one column after its quote, which matters for positions
    # inside a filter expression
    quoted = isinstance(node, yaml.ScalarNode) and node.style in ("'", '"')
    start = _pos(node.start_mark)
    values[path] = Position(start.line, start.column + 1) if quoted else start
    if len(path) > MAX_DEPTH:
        p = _pos(node.start_mark)
        raise PlanError("the plan is nested too deeply", where=f"{filename}:{p.line}:{p.column}",
                        hint=f"a plan needs no more than {MAX_DEPTH} levels")
    if isinstance(node, yaml.MappingNode):
        out: dict[str, Any] = {}
        for key_node, value_node in node.value:
            kp = _pos(key_node.start_mark)
            if not isinstance(key_node, yaml.ScalarNode):
                raise PlanError("a key must be a plain word", where=f"{filename}:{kp.line}:{kp.column}")
            key = str(key_node.value)
            if key in out:
                first = keys[path + (key,)]
                raise PlanError(f"{dotted(path + (key,))}: duplicate key '{key}' (first at line {first.line})",
                                where=f"{filename}:{kp.line}:{kp.column}",
                                hint="each key may appear once; remove or rename one of them")
            keys[path + (key,)] = kp
            out[key] = _build(value_node, path + (key,), values, keys, filename)
        return out
    if isinstance(node, yaml.SequenceNode):
        return [_build(item, path + (i,), values, keys, filename) for i, item in enumerate(node.value)]
    # Scalars: the usual plain types; anything else (timestamps) stays the text as written, so a
    # date in a plan is never silently turned into a datetime object.
    if node.tag in ("tag:yaml.org,2002:int", "tag:yaml.org,2002:float") and _SURPRISING_NUMBER.fullmatch(node.value):
        raise PlanError(f"{dotted(path)}: the number {node.value} has a leading zero, a base prefix or a colon, "
                        "which YAML 1.1 reads as octal, hexadecimal, binary or base 60 "
                        f"({_SCALAR_LOADER.construct_object(node)!r} here)",
                        where=f"{filename}:{start.line}:{start.column}",
                        hint="write the number in plain decimal without leading zeros (e.g. 17, 10000), or "
                             "quote it if it is text")
    if node.tag in _PLAIN_TAGS:
        try:
            value = _SCALAR_LOADER.construct_object(node)
            _SCALAR_LOADER.constructed_objects.pop(node, None)  # the loader would keep every node alive
            return value
        except ValueError:  # e.g. an integer of more than 4300 digits (Python's conversion limit)
            raise PlanError(f"{dotted(path)}: the value cannot be read as a number", where=f"{filename}:"
                            f"{start.line}:{start.column}", hint="write a shorter number") from None
    return str(node.value)
