"""The stop rule: after each stage, is the student's quality within tolerance of the teacher at full steps?

One metric (stop.metric = a metric name):
  relative: limit = q_teacher * (1 + tolerance)      (sw2, fd: distances that stay > 0)
  absolute: limit = q_teacher + tolerance             (any metric; the only mode for signed metrics such as mmd2
                                                       and nll_gap, which hover around 0 and can go negative)
  For a metric where higher is better (precision, recall, density, coverage) the limit lies below the teacher:
  q_teacher * (1 - tolerance) or q_teacher - tolerance.
A stage is 'over' only when the value is beyond the limit by more than z * se, se = sqrt(se_student^2 +
se_teacher^2), so sampling noise alone does not stop a run; a metric whose both signs mean worse (the NLL gap) is compared by its size |q|
(MetricProps.by_size).

A panel (stop.metric = panel): several share metrics (stop.panel; shares of points, 0..1), each judged with the one
absolute tolerance stop.tolerance (a share of points). The stage is over when any metric is over; the verdict names
the metric that decided: the one furthest over its limit, or, when all are within, the one closest to its limit.

Every judged metric also carries `seen`: the student's worsening against the teacher in units of the combined
standard error ((q - q_teacher) / se, sign turned so that > 0 is worse). seen >= 3 means the evaluation sees the
difference clearly; whether that difference is acceptable is the tolerance's question.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

from .metric_props import METRIC_PROPS

WITHIN, OVER, FAILED = "within", "over", "failed"
PANEL = "panel"


@dataclass
class Verdict:
    verdict: str  # within | over | failed
    value: float
    limit: float
    margin: float  # distance from (value, moved z se towards the teacher) to the limit: > 0 means room to spare
    reason: str
    metric: str = ""  # the metric that decided
    seen: float = math.nan  # worsening against the teacher / combined se (> 0: worse than the teacher)
    detectable: float = math.nan  # z * combined se: the smallest worsening this evaluation tells from noise
    panel: dict = field(default_factory=dict)  # panel rule: every metric's own judgment, by name


def higher_is_better(metric: str) -> bool:
    props = METRIC_PROPS.get(metric)
    return bool(props and props.higher_better)


def limit_for(teacher_value: float, tolerance: float, mode: str, higher_better: bool = False) -> float:
    sign = -1.0 if higher_better else 1.0
    return teacher_value * (1 + sign * tolerance) if mode == "relative" else teacher_value + sign * tolerance


def judge(quality: dict, teacher: dict, metric: str, tolerance: float, mode: str, z: float) -> Verdict:
    """Verdict of one stage from its quality dict and the teacher's (both hold metric and metric_se)."""
    q, q_t = quality.get(metric, math.nan), teacher.get(metric, math.nan)
    se = math.hypot(quality.get(f"{metric}_se", 0.0), teacher.get(f"{metric}_se", 0.0))
    if METRIC_PROPS[metric].by_size:
        q, q_t = abs(q), abs(q_t)
    up = higher_is_better(metric)
    limit = limit_for(q_t, tolerance, mode, up)
    if not math.isfinite(q):
        return Verdict(FAILED, q, limit, math.nan, f"{metric} is not finite", metric=metric)
    worse = (q_t - q) if up else (q - q_t)  # > 0: the student is worse than the teacher
    margin = (q + z * se - limit) if up else (limit - (q - z * se))
    seen = worse / se if se > 0 else (math.copysign(math.inf, worse) if worse else 0.0)
    rule = (f"{metric}={q:.4g} (se {se:.2g}, student and teacher combined) vs limit {limit:.4g} "
            f"({mode} tolerance {tolerance:g}, z={z:g}; {'higher' if up else 'lower'} is better; "
            f"{seen:+.1f} se from the teacher's {q_t:.4g})")
    return Verdict(WITHIN if margin >= 0 else OVER, q, limit, margin, rule, metric=metric, seen=seen,
                   detectable=z * se)


def judge_panel(quality: dict, teacher: dict, panel, tolerance: float, z: float) -> Verdict:
    """Verdict over several share metrics, each judged with the absolute tolerance `tolerance`; names the decider."""
    panel = list(panel)
    if not panel:
        raise ValueError("the panel holds no metric")
    verdicts = {m: judge(quality, teacher, m, tolerance, "absolute", z) for m in panel}
    failed = [m for m, v in verdicts.items() if v.verdict == FAILED]
    # the decider: a failed metric, else the smallest margin: the furthest over, or the closest to its limit
    decider = failed[0] if failed else min(verdicts, key=lambda m: verdicts[m].margin)
    d = verdicts[decider]
    others = "; ".join(f"{m} {v.verdict} ({v.seen:+.1f} se)" for m, v in verdicts.items() if m != decider)
    reason = f"decided by {d.reason}" + (f" | {others}" if others else "")
    table = {m: {"verdict": v.verdict, "value": v.value, "teacher": teacher.get(m, math.nan), "limit": v.limit,
                 "margin": v.margin, "seen": v.seen, "detectable": v.detectable} for m, v in verdicts.items()}
    return Verdict(d.verdict, d.value, d.limit, d.margin, reason, metric=decider, seen=d.seen,
                   detectable=d.detectable, panel=table)


def tolerance_of(stop) -> float:
    """stop.tolerance, or the rule's default when it is null (panel: a share; one metric, relative: a fraction)."""
    from .config import PANEL_TOLERANCE, RELATIVE_TOLERANCE

    if stop.tolerance is not None:
        return float(stop.tolerance)
    return PANEL_TOLERANCE if stop.metric == PANEL else RELATIVE_TOLERANCE


def judge_rule(quality: dict, teacher: dict, stop) -> Verdict:
    """The configured rule (a StopConfig or any object with metric, mode, tolerance, z and panel)."""
    if stop.metric == PANEL:
        return judge_panel(quality, teacher, stop.panel, tolerance_of(stop), stop.z)
    return judge(quality, teacher, stop.metric, tolerance_of(stop), stop.mode, stop.z)


def rule_metrics(stop) -> list[str]:
    """The metrics a StopConfig judges by."""
    return list(stop.panel) if stop.metric == PANEL else [stop.metric]


def power_warnings(teacher: dict, stop, n: int) -> list[str]:
    """One line per judged metric whose tolerance is finer than what n evaluation samples can resolve: the smallest
    worsening told from noise at the rule's z is about z * sqrt(2) * se_teacher (the student's se taken equal to the
    teacher's), and a tolerance below it makes the effective limit tolerance + that amount."""
    tol = tolerance_of(stop)
    lines = []
    for m in rule_metrics(stop):
        se = teacher.get(f"{m}_se", math.nan)
        if not math.isfinite(se):
            continue
        detect = stop.z * math.sqrt(2) * se
        unit = tol * abs(teacher.get(m, math.nan)) if stop.metric != PANEL and stop.mode == "relative" else tol
        if detect > unit:
            lines.append(f"stop rule: {m} tolerance {unit:.3g} is below the smallest difference eval.samples={n} "
                         f"detects at z={stop.z:g} ({detect:.3g}); eval.samples={samples_for(n, detect, unit)} "
                         f"would resolve it (or set eval.detect={unit:.3g})")
    return lines


def samples_for(n: int, detectable: float, target: float) -> int:
    """Evaluation size at which a difference `detectable` at n samples shrinks to `target`: a mean's se falls as
    1/sqrt(n), so n (detectable / target)^2, rounded up to a multiple of 256 (at least 512)."""
    need = n * (detectable / target) ** 2
    return max(512, 256 * math.ceil(need / 256 - 1e-9))


def choose(stages: list[dict]) -> dict | None:
    """The chosen student: the last stage within tolerance (the fewest steps that passed), else None."""
    passing = [s for s in stages if s["verdict"] == WITHIN]
    return min(passing, key=lambda s: (s["steps"], -s["index"])) if passing else None
