"""The stop rule (distillrun.stopping) on hand-made quality dicts. The rule is the project's own
(the stop rule of distillrun/stopping.py, decided with error bars); every expected value is hand arithmetic."""
from __future__ import annotations

import math

import pytest

from distillrun.stopping import FAILED, OVER, WITHIN, choose, judge, judge_panel, limit_for


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


# ------------------------------------------------------------------------- metrics where higher is better
@pytest.mark.parametrize("q,verdict", [(0.951, WITHIN), (0.949, OVER)])
def test_higher_is_better_metric_limit_lies_below_the_teacher(q, verdict):
    # precision: a share that falls when quality is lost (Kynkaenniemi et al. 2019). Teacher 0.97, absolute
    # tolerance 0.02 -> limit 0.95 (hand arithmetic); no se: over below it.
    v = judge({"precision": q}, {"precision": 0.97}, "precision", 0.02, "absolute", z=2.0)
    assert v.verdict == verdict and v.limit == pytest.approx(0.95)
    assert v.margin == pytest.approx(q - 0.95)


def test_higher_is_better_relative_limit_and_slack():
    # relative: 0.97 (1 - 0.1) = 0.873; se = hypot(0.003, 0.004) = 0.005; over only if q + 2 se < 0.873.
    t = {"coverage": 0.97, "coverage_se": 0.004}
    assert judge({"coverage": 0.864, "coverage_se": 0.003}, t, "coverage", 0.1, "relative", 2.0).verdict == WITHIN
    assert judge({"coverage": 0.862, "coverage_se": 0.003}, t, "coverage", 0.1, "relative", 2.0).verdict == OVER


def test_seen_counts_standard_errors_of_worsening():
    # seen = worsening / combined se: precision 0.97 -> 0.94 with se hypot(0.003, 0.004) = 0.005 is 6 se worse;
    # sw2 0.10 -> 0.09 (better) is -2 se. detectable = z * se.
    v = judge({"precision": 0.94, "precision_se": 0.003}, {"precision": 0.97, "precision_se": 0.004}, "precision",
              0.02, "absolute", 2.0)
    assert v.seen == pytest.approx(6.0) and v.detectable == pytest.approx(0.01)
    w = judge({"sw2": 0.09, "sw2_se": 0.003}, {"sw2": 0.10, "sw2_se": 0.004}, "sw2", 0.5, "relative", 2.0)
    assert w.seen == pytest.approx(-2.0)


# ------------------------------------------------------------------------------- the panel and its decider
TEACHER = {"precision": 0.97, "precision_se": 0.0, "coverage": 0.96, "coverage_se": 0.0, "c2st": 0.50, "c2st_se": 0.0}
PANEL = ["precision", "coverage", "c2st"]


def _q(**changes):
    q = dict(TEACHER)
    q.update(changes)
    return q


def test_panel_over_names_the_metric_that_is_over():
    # tolerance 0.02: coverage 0.93 < 0.96 - 0.02 = 0.94 -> over; precision and c2st untouched.
    v = judge_panel(_q(coverage=0.93), TEACHER, PANEL, 0.02, z=2.0)
    assert v.verdict == OVER and v.metric == "coverage"
    assert v.limit == pytest.approx(0.94) and v.value == pytest.approx(0.93)
    assert v.panel["precision"]["verdict"] == WITHIN and v.panel["coverage"]["verdict"] == OVER
    assert "decided by coverage" in v.reason


def test_panel_decider_is_the_furthest_over():
    # tolerance 0.02. precision 0.94: 0.01 below its limit 0.95; c2st 0.535: 0.015 above its limit 0.52;
    # coverage 0.91: 0.03 below its limit 0.94 -> coverage decides (hand arithmetic).
    v = judge_panel(_q(precision=0.94, c2st=0.535, coverage=0.91), TEACHER, PANEL, 0.02, z=0.0)
    assert v.verdict == OVER and v.metric == "coverage" and v.margin == pytest.approx(-0.03)
    # without coverage's loss, c2st (0.015 over) beats precision (0.01 over)
    v = judge_panel(_q(precision=0.94, c2st=0.535), TEACHER, PANEL, 0.02, z=0.0)
    assert v.metric == "c2st" and v.margin == pytest.approx(-0.015)


def test_panel_within_names_the_metric_closest_to_its_limit():
    # all within: precision 0.96 (0.01 left of 0.02), coverage 0.955 (0.015 left), c2st 0.505 (0.015 left)
    # -> precision is the binding one.
    v = judge_panel(_q(precision=0.96, coverage=0.955, c2st=0.505), TEACHER, PANEL, 0.02, z=0.0)
    assert v.verdict == WITHIN and v.metric == "precision"
    assert v.margin == pytest.approx(0.01)


def test_panel_failed_metric_fails_the_stage():
    v = judge_panel(_q(coverage=math.nan), TEACHER, PANEL, 0.02, z=2.0)
    assert v.verdict == FAILED and v.metric == "coverage"


def test_panel_slack_of_z_se_per_metric():
    # precision 0.945 is 0.005 under its limit 0.95; with se hypot(0.002, 0.002) = 0.00283, z = 2 gives 0.00566
    # slack -> within; z = 1 -> over.
    t = dict(TEACHER, precision_se=0.002)
    q = _q(precision=0.945, precision_se=0.002)
    assert judge_panel(q, t, PANEL, 0.02, z=2.0).verdict == WITHIN
    assert judge_panel(q, t, PANEL, 0.02, z=1.0).verdict == OVER


def test_power_warning_when_tolerance_below_detectable():
    # detectable ~ z sqrt2 se_teacher = 2 * 1.414 * 0.01 = 0.0283 > 0.02: warn, and name the size that resolves it:
    # n (0.0283 / 0.02)^2 = 4096 * 2 = 8192 (se ~ 1/sqrt(n)). coverage (se 0.005: 0.0141 < 0.02) gets no line.
    from types import SimpleNamespace

    from distillrun.stopping import power_warnings

    stop = SimpleNamespace(metric="panel", panel=["precision", "coverage"], z=2.0, mode="absolute", tolerance=0.02)
    lines = power_warnings({"precision": 0.97, "precision_se": 0.01, "coverage": 0.96, "coverage_se": 0.005}, stop,
                           4096)
    assert len(lines) == 1 and "precision" in lines[0] and "eval.samples=8192 would" in lines[0]
