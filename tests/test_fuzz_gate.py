"""Issue 13, fuzz: mutants of every shipped problem (through ``validate``) and of a plan.json
(through ``check``) as a careless or hostile user would make them.  No solve is run.

Asserted: exit 0 only for an untouched plan or a problem that still validates; otherwise exit 2
with the file named, or exit 3; never a traceback, never exit 0 for a tampered plan, nothing written.
Bounded: few examples, no deadline (check re-propagates, ~0.2 s a plan).
"""

from __future__ import annotations

import copy
import json
import math

import tomli_w
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from export_fixture import make_case
from optimizer.export import plan_json
from optimizer.export.check import MODEL_KEYS, RESIDUAL_FLOOR
from optimizer.problem_file import _is_number
from test_problem_file import DEMOS, at, leaves, raw, run

HOSTILE = st.one_of(st.just(10 ** 400), st.just(-10 ** 400), st.just(1e300), st.just(-1e300), st.just(math.nan),
                    st.just(math.inf), st.just(""), st.just("\x07\x1b\x7f"), st.just("x" * 100_000),
                    st.just([[[[[[[[[[[]]]]]]]]]]]), st.just({"a": {"b": {}}}), st.booleans(), st.integers(),
                    st.floats(allow_nan=False), st.text(max_size=20), st.lists(st.floats(allow_nan=False), max_size=4))

_PLAN = {}


def base_plan():
    if not _PLAN:
        problem, _, plan = make_case()
        _PLAN["d"] = plan_json(plan, problem)
    return copy.deepcopy(_PLAN["d"])


@given(path=st.sampled_from(DEMOS), data=st.data(), value=HOSTILE)
@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])
def test_fuzzed_problem_files_exit_0_or_2_never_a_traceback(tmp_path_factory, path, data, value):
    d = raw(path)
    key_path = data.draw(st.sampled_from([p for p, _ in leaves(d)]))
    at(d, key_path)[key_path[-1]] = value
    try:
        text = tomli_w.dumps(d)
    except (TypeError, ValueError):  # not writable as TOML (nan is; None is not): nothing to test
        return
    folder = tmp_path_factory.mktemp("fuzz")
    f = folder / "mutant.toml"
    f.write_text(text)
    code, _, err = run(["validate", str(f)])
    assert "Traceback" not in err
    assert code in (0, 2), err
    if code == 2:
        assert str(f) in err
    assert sorted(p.name for p in folder.iterdir()) == ["mutant.toml"]


def _plan_leaves(d, path=()):
    if isinstance(d, dict):
        for k, v in d.items():
            # not claims check re-derives: the optimiser's own record (nodes, warm start, solver and
            # search logs) and the software's name and caution text
            if k in ("trajectory", "warm_start", "solver", "search", "software", "caution"):
                continue
            yield from _plan_leaves(v, path + (k,))
    elif isinstance(d, list) and d and len(d) <= 12:
        for i, v in enumerate(d):
            yield from _plan_leaves(v, path + (i,))
    else:
        yield path


@given(data=st.data(), value=HOSTILE)
@settings(max_examples=20, deadline=None, suppress_health_check=[HealthCheck.too_slow])
def test_fuzzed_plans_never_pass_check_when_a_claim_changed(tmp_path_factory, data, value):
    d = base_plan()
    paths = [p for p in _plan_leaves(d) if p]
    key_path = data.draw(st.sampled_from(paths))
    target = d
    for k in key_path[:-1]:
        target = target[k]
    old = target[key_path[-1]]
    target[key_path[-1]] = value
    folder = tmp_path_factory.mktemp("fuzzplan")
    f = folder / "plan.json"
    try:
        f.write_text(json.dumps(d))
    except (ValueError, TypeError):
        return
    code, _, err = run(["check", str(f), "--quiet"])
    assert "Traceback" not in err
    assert code in (0, 2, 3), err
    if code == 0:
        assert _may_pass(key_path, old, value), (key_path, old, value)
    assert sorted(p.name for p in folder.iterdir()) == ["plan.json"]


def _may_pass(key_path, old, value) -> bool:
    """Changes that claim nothing false, so that check may pass them; each says why."""
    if value == old and type(value) is type(old):
        return True  # nothing changed
    head = key_path[0]
    if head in ("name", "reason"):
        return True  # the plan's label and (empty for a verified plan) its failure reason: free text
    if head == "model" and key_path[1] not in MODEL_KEYS:
        return True  # the solver's ephemeris fit over its own span (window, degree, fit error, file):
        # a description, not the physics (name, bodies, GMs, J2 are compared)
    if head == "problem":
        return True  # a problem that still validates and that the burns still meet (check re-judged every
        # constraint of the changed problem on the re-propagated path): "this plan meets that problem" holds
    if head == "verification" and key_path[1] in ("events", "constraints"):
        return True  # the solve-time record of the re-propagation; check re-propagates and judges anew
    if head == "verification" and key_path[1] == "residuals" and _is_number(value) and _is_number(old):
        return abs(value - old) <= RESIDUAL_FLOOR  # within the re-derived residual's documented tolerance
    return False
