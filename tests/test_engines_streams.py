"""Reproducible streams and the purity of the engines package (DEVELOPERS.md: Reproducibility rules,
Layout)."""

from __future__ import annotations

import ast
import hashlib
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from planrunner.engines.streams import (
    DRAW_BLOCK,
    GENERATOR,
    Stream,
    UniformRows,
    analysis_key,
    stream_for,
)

ENGINES = Path(__file__).resolve().parents[1] / "planrunner" / "engines"


def manual_generator(root: int, key: tuple[int, ...], block: int) -> np.random.Generator:
    # the documented construction, spelled out (DEVELOPERS.md: Reproducibility rules)
    return np.random.Generator(np.random.PCG64(np.random.SeedSequence(entropy=root, spawn_key=key + (block,))))


def test_contract_constants() -> None:
    assert DRAW_BLOCK == 1000  # reproducibility contract
    assert GENERATOR == "PCG64"


def test_analysis_key_is_first_eight_bytes_of_sha256() -> None:
    # definition: first 8 bytes of sha256(id), big-endian
    for text in ["primary", "paired-routes", "é-ünïcode", ""]:
        digest = hashlib.sha256(text.encode("utf-8")).digest()
        assert analysis_key(text) == int.from_bytes(digest[:8], "big")
        assert 0 <= analysis_key(text) < 2 ** 64
    assert analysis_key("primary") == 10982620814346852449  # same definition, evaluated once


def test_generator_matches_documented_construction() -> None:
    stream = stream_for(20261201, "primary")
    assert stream.key == (analysis_key("primary"),)
    for block in (0, 1, 7):
        expected = manual_generator(20261201, stream.key, block).random(50)
        assert np.array_equal(stream.generator(block).random(50), expected)


def test_child_and_describe() -> None:
    stream = stream_for(5, "a")
    child = stream.child(3)
    assert child.root_seed == 5 and child.key == stream.key + (3,)
    assert stream.describe() == {"root_seed": 5, "spawn_key": [analysis_key("a")],
                                 "generator": "PCG64", "draw_block": 1000}
    assert not np.array_equal(child.generator(0).random(5), stream.generator(0).random(5))


def test_invalid_seeds_rejected() -> None:
    with pytest.raises(ValueError, match="non-negative"):
        Stream(-1, (1,))
    with pytest.raises(ValueError, match="non-negative"):
        Stream(1, (-2,))
    with pytest.raises(ValueError, match="block_index"):
        Stream(1, (2,)).generator(-1)


def test_same_id_same_numbers_different_id_different_numbers() -> None:
    a1 = UniformRows(stream_for(11, "primary"), 4).take(3)
    a2 = UniformRows(stream_for(11, "primary"), 4).take(3)
    b = UniformRows(stream_for(11, "sensitivity"), 4).take(3)
    c = UniformRows(stream_for(12, "primary"), 4).take(3)
    assert np.array_equal(a1, a2)
    assert not np.array_equal(a1, b)
    assert not np.array_equal(a1, c)


def test_rows_follow_blocks() -> None:
    # resample r is row r % DRAW_BLOCK of block r // DRAW_BLOCK
    stream = stream_for(3, "x")
    width = 6
    rows = UniformRows(stream, width).take(2 * DRAW_BLOCK + 5)
    block0 = manual_generator(3, stream.key, 0).random((DRAW_BLOCK, width))
    block2 = manual_generator(3, stream.key, 2).random((5, width))
    assert np.array_equal(rows[:DRAW_BLOCK], block0)
    assert np.array_equal(rows[2 * DRAW_BLOCK:], block2)


def test_start_mid_block_equals_sequential() -> None:
    stream = stream_for(3, "x")
    whole = UniformRows(stream, 5).take(2500)
    for start in (1, 999, 1000, 1234):
        part = UniformRows(stream, 5, start=start).take(2500 - start)
        assert np.array_equal(part, whole[start:])


@settings(max_examples=40, deadline=None)
@given(splits=st.lists(st.integers(min_value=1, max_value=700), min_size=1, max_size=8),
       width=st.integers(min_value=1, max_value=9))
def test_any_split_of_rows_gives_identical_numbers(splits: list[int], width: int) -> None:
    stream = stream_for(99, "split")
    total = sum(splits)
    whole = UniformRows(stream, width).take(total)
    reader = UniformRows(stream, width)
    pieces = [reader.take(k) for k in splits]
    assert reader.next_row == total
    assert np.array_equal(np.vstack(pieces), whole)


ALLOWED_IMPORTS = {"numpy", "scipy", "math", "dataclasses", "hashlib", "itertools", "typing",
                   "collections", "__future__", "planrunner"}


@pytest.mark.parametrize("path", sorted(ENGINES.glob("*.py")), ids=lambda p: p.name)
def test_engines_are_pure(path: Path) -> None:
    # engines import numpy/scipy/stdlib maths only; no files, clock, printing (DEVELOPERS.md: Layout)
    tree = ast.parse(path.read_text(encoding="utf-8"))
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            names = [alias.name for alias in node.names]
        elif isinstance(node, ast.ImportFrom):
            names = [node.module or ""]
        else:
            if isinstance(node, ast.Call) and isinstance(node.func, ast.Name):
                assert node.func.id not in {"print", "open", "eval", "exec"}, f"{path.name} calls {node.func.id}"
            continue
        for name in names:
            top = name.split(".")[0]
            assert top in ALLOWED_IMPORTS, f"{path.name} imports {name}"
            if top == "planrunner":
                assert name.startswith(("planrunner.engines", "planrunner.errors")), f"{path.name} imports {name}"
