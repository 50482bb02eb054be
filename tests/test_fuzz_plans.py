"""Hostile and random plans: the loader answers with PlanError (or a valid plan), never another
exception, and refuses oversized or over-deep input before spending time on it.

Time is bounded by construction rather than asserted (tests never assert timings): the size limit
is applied to the bytes before parsing, nesting is counted on the YAML tokens before composing,
and the hypothesis examples are small.
"""

from __future__ import annotations

import atexit
import shutil
import tempfile
from pathlib import Path

import yaml
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from planrunner.errors import PlanError, PlanrunnerError
from planrunner.pipeline.check import check_plan
from planrunner.plan.load import read_plan
from planrunner.plan.yamlsafe import MAX_DEPTH, MAX_PLAN_BYTES

VALID = {
    "plan": "fuzz",
    "title": "Fuzzed plan",
    "seed": 7,
    "datasets": {"d": {"file": "d.csv", "columns": {"g": {"type": "category", "levels": ["a", "b"]},
                                                     "y": {"type": "number", "min": 0},
                                                     "s": {"type": "category"}},
                       "rows_where": "y < 100"}},
    "analyses": [{"id": "one", "data": "d", "outcome": "y", "groups": {"by": "g", "compare": ["a", "b"]},
                  "strata": "s", "statistic": "mean_difference", "method": "jackknife"},
                 {"id": "two", "role": "secondary", "data": "d", "outcome": "y", "statistic": "mean",
                  "method": "bootstrap", "resamples": 49}],
    "multiplicity": [],
}
DATA = "g,y,s\na,1,p\na,2,q\na,4,p\na,3,q\nb,3,p\nb,5,q\nb,9,p\nb,7,q\n"
FOLDER = Path(tempfile.mkdtemp(prefix="planrunner-fuzz-"))
(FOLDER / "d.csv").write_text(DATA, encoding="utf-8")
atexit.register(shutil.rmtree, FOLDER, ignore_errors=True)
FUZZ = settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])


def load(data: bytes | str) -> None:
    """read_plan on the bytes: a valid plan or PlanError, nothing else."""
    path = FOLDER / "plan.yaml"
    path.write_bytes(data if isinstance(data, bytes) else data.encode("utf-8", "surrogatepass"))
    try:
        read_plan(path)
    except PlanError:
        pass


def test_the_base_plan_is_valid():
    path = FOLDER / "base.yaml"
    path.write_text(yaml.safe_dump(VALID), encoding="utf-8")
    assert len(check_plan(path).jobs) == 2


@FUZZ
@given(st.binary(max_size=400))
def test_random_bytes(data):
    load(data)


YAMLISH = st.text(alphabet=list("abcy019 :-,[]{}&*!|>'\"#?%@`\n\t.\\~") + ["\x00", "\ufeff", "é"], max_size=300)


@FUZZ
@given(YAMLISH)
def test_random_yaml_like_text(text):
    load(text)


@FUZZ
@given(YAMLISH)
def test_random_text_spliced_into_a_valid_plan(text):
    base = yaml.safe_dump(VALID, sort_keys=False)
    cut = len(text) % len(base)
    load(base[:cut] + text + base[cut:])


SCALARS = st.one_of(st.none(), st.booleans(), st.integers(min_value=-2**70, max_value=2**70),
                    st.floats(allow_nan=True, allow_infinity=True), st.text(max_size=20),
                    st.sampled_from(["a", "b", "y", "g", "s", "d", "one", "mean", "bootstrap", "permutation",
                                     "jackknife", "number", "category", "holm", "y > 1", "two-sided"]))
TREES = st.recursive(SCALARS, lambda inner: st.one_of(
    st.lists(inner, max_size=4), st.dictionaries(st.one_of(st.text(max_size=8), st.integers()), inner, max_size=4)),
    max_leaves=20)


@FUZZ
@given(TREES)
def test_random_trees(tree):
    load(yaml.safe_dump(tree))


def paths(node, prefix=()):
    yield prefix
    if isinstance(node, dict):
        for key, value in node.items():
            yield from paths(value, prefix + (key,))
    elif isinstance(node, list):
        for i, value in enumerate(node):
            yield from paths(value, prefix + (i,))


ALL_PATHS = list(paths(VALID))[1:]


def replaced(tree, path, value, delete=False):
    import copy
    out = copy.deepcopy(tree)
    node = out
    for part in path[:-1]:
        node = node[part]
    if delete:
        del node[path[-1]]
    else:
        node[path[-1]] = value
    return out


@FUZZ
@given(st.sampled_from(ALL_PATHS), TREES, st.booleans())
def test_mutated_valid_plan_through_the_data_checks(path, value, delete):
    """One part of a valid plan replaced by a random tree (or removed): the plan check and, when it
    passes, the data checks and compile answer with the project's own errors only."""
    plan = replaced(VALID, path, value, delete)
    target = FOLDER / "mutated.yaml"
    target.write_text(yaml.safe_dump(plan), encoding="utf-8")
    try:
        check_plan(target)
    except PlanrunnerError:
        pass


def test_oversized_plan_is_refused_before_parsing(tmp_path):
    path = tmp_path / "big.yaml"
    # an unparseable body: the refusal must come from the size, not from the parser
    path.write_bytes(b"plan: x\n" + b"[" * MAX_PLAN_BYTES)
    try:
        read_plan(path)
    except PlanError as error:
        assert f"larger than {MAX_PLAN_BYTES} bytes" in str(error)
    else:
        raise AssertionError("an oversized plan was accepted")


def test_deep_flow_nesting_is_refused_without_recursion_error():
    for opener in ("[", "{a: "):
        try:
            load("x: " + opener * 200_000)
        except RecursionError:  # pragma: no cover - the failure this test guards against
            raise AssertionError("the YAML composer recursed") from None
    path = FOLDER / "deep.yaml"
    path.write_text("x: " + "[" * (MAX_DEPTH + 5) + "]" * (MAX_DEPTH + 5), encoding="utf-8")
    try:
        read_plan(path)
    except PlanError as error:
        assert "nested too deeply" in str(error)
    else:
        raise AssertionError("a plan nested too deeply was accepted")


def test_nesting_up_to_the_limit_is_only_a_schema_matter():
    path = FOLDER / "limit.yaml"
    path.write_text(yaml.safe_dump({**VALID, "description": [[[[["deep"]]]]]}), encoding="utf-8")
    try:
        read_plan(path)
    except PlanError as error:  # a list is not text: a schema error, not a nesting one
        assert "nested too deeply" not in str(error) and "must be text" in str(error)
    else:
        raise AssertionError("a list was accepted as a description")
