"""The stop rule (distillrun.stopping) on hand-made quality dicts. The rule is the project's own
(the stop rule of distillrun/stopping.py, decided with error bars); every expected value is hand arithmetic."""
from __future__ import annotations

import math

import pytest

from distillrun.stopping import FAILED, OVER, WITHIN, choose, judge, limit_for


def test_limits():
    # relative: q_teacher (1 + tol); absolute: q_teacher + tol (stopping.py docstring; by hand).
    assert limit_for(0.1, 0.5, "relative") == pytest.approx(0.15)
    assert limit_for(0.1, 0.5, "absolute") == pytest.approx(0.6)


@pytest.mark.parametrize("q,verdict", [(0.149, WITHIN), (0.151, OVER)])
def test_relative_limit_without_error_bars(q, verdict):
    v = judge({"sw2": q}, {"sw2": 0.1}, "sw2", 0.5, "relative", z=2.0)
    assert v.verdict == verdict
    assert v.limit == pytest.approx(0.15)
    assert v.value == q
    assert v.margin == pytest.approx(0.15 - q)  # no se given: se = 0


@pytest.mark.parametrize("q,verdict", [(0.0505, WITHIN), (0.0515, OVER)])
def test_absolute_limit(q, verdict):
    # mmd2 teacher 0.001, tolerance 0.05 -> limit 0.051.
    v = judge({"mmd2": q}, {"mmd2": 0.001}, "mmd2", 0.05, "absolute", z=2.0)
    assert v.verdict == verdict and v.limit == pytest.approx(0.051)


@pytest.mark.parametrize("q,verdict", [(0.159, WITHIN), (0.161, OVER)])
def test_z_se_slack(q, verdict):
    # se = sqrt(0.003^2 + 0.004^2) = 0.005 (3-4-5); over only if q - 2 * 0.005 > 0.15, i.e. q > 0.16.
    v = judge({"sw2": q, "sw2_se": 0.003}, {"sw2": 0.1, "sw2_se": 0.004}, "sw2", 0.5, "relative", z=2.0)
    assert v.verdict == verdict
    assert v.margin == pytest.approx(0.15 - (q - 0.01))
    # the same value without error bars is over in both cases
    assert judge({"sw2": q}, {"sw2": 0.1}, "sw2", 0.5, "relative", z=2.0).verdict == OVER
    # z = 0 switches the slack off
    no_slack = judge({"sw2": q, "sw2_se": 0.003}, {"sw2": 0.1, "sw2_se": 0.004}, "sw2", 0.5, "relative", z=0.0)
    assert no_slack.verdict == OVER


@pytest.mark.parametrize("bad", [math.nan, math.inf, -math.inf])
def test_non_finite_quality_fails(bad):
    v = judge({"sw2": bad, "sw2_se": 0.01}, {"sw2": 0.1}, "sw2", 0.5, "relative", z=2.0)
    assert v.verdict == FAILED
    assert "not finite" in v.reason


def test_missing_metric_fails():
    assert judge({}, {"sw2": 0.1}, "sw2", 0.5, "relative", z=2.0).verdict == FAILED


def test_nll_gap_compared_by_absolute_value():
    # The NLL gap can go negative when samples pile onto modes; bound its size |gap|.
    teacher = {"nll_gap": -0.02, "nll_gap_se": 0.0}
    # limit = |-0.02| + 0.2 = 0.22
    v = judge({"nll_gap": -0.3}, teacher, "nll_gap", 0.2, "absolute", z=2.0)
    assert v.verdict == OVER  # signed, -0.3 would have passed
    assert v.value == pytest.approx(0.3) and v.limit == pytest.approx(0.22)
    assert judge({"nll_gap": -0.1}, teacher, "nll_gap", 0.2, "absolute", z=2.0).verdict == WITHIN
    assert judge({"nll_gap": 0.25}, teacher, "nll_gap", 0.2, "absolute", z=2.0).verdict == OVER


def test_reason_names_rule():
    v = judge({"sw2": 0.2}, {"sw2": 0.1}, "sw2", 0.5, "relative", z=2.0)
    assert "sw2" in v.reason and "relative" in v.reason


def _stage(index, steps, verdict):
    return {"index": index, "steps": steps, "verdict": verdict}


def test_choose_picks_fewest_steps_within():
    # The result is the last stage within tolerance, i.e. the fewest steps that passed.
    stages = [_stage(1, 8, WITHIN), _stage(2, 4, WITHIN), _stage(3, 2, OVER)]
    assert choose(stages)["steps"] == 4
    stages = [_stage(1, 4, WITHIN), _stage(2, 2, OVER), _stage(3, 1, WITHIN)]
    assert choose(stages)["steps"] == 1
    stages = [_stage(1, 8, WITHIN), _stage(2, 4, FAILED)]
    assert choose(stages)["index"] == 1
    # order of the list does not matter
    assert choose([_stage(2, 2, WITHIN), _stage(1, 4, WITHIN)])["steps"] == 2


def test_choose_none_when_nothing_passes():
    assert choose([_stage(1, 8, OVER), _stage(2, 4, FAILED)]) is None
    assert choose([]) is None
