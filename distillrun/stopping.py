"""The stop rule: after each stage, is the student's quality within tolerance of the teacher at full steps?

relative: limit = q_teacher * (1 + tolerance)      (sw2, fd: distances that stay > 0)
absolute: limit = q_teacher + tolerance             (any metric; the only mode for signed metrics, which
                                                     hover around 0 and can go negative: metric_props)
A stage is 'over' only when q - z * se is still above the limit, se = sqrt(se_student^2 + se_teacher^2),
so sampling noise alone does not stop a run. A metric whose both signs mean worse (the NLL gap: negative when
samples pile onto the modes) is compared by its size |q| (MetricProps.by_size).
"""
from __future__ import annotations

import math
from dataclasses import dataclass

from .metric_props import METRIC_PROPS

WITHIN, OVER, FAILED = "within", "over", "failed"


@dataclass
class Verdict:
    verdict: str  # within | over | failed
    value: float
    limit: float
    margin: float  # limit - (value - z se): > 0 means room to spare
    reason: str


def limit_for(teacher_value: float, tolerance: float, mode: str) -> float:
    return teacher_value * (1 + tolerance) if mode == "relative" else teacher_value + tolerance


def judge(quality: dict, teacher: dict, metric: str, tolerance: float, mode: str, z: float) -> Verdict:
    """Verdict of one stage from its quality dict and the teacher's (both hold metric and metric_se)."""
    q, q_t = quality.get(metric, math.nan), teacher[metric]
    se = math.hypot(quality.get(f"{metric}_se", 0.0), teacher.get(f"{metric}_se", 0.0))
    if METRIC_PROPS[metric].by_size:
        q, q_t = abs(q), abs(q_t)
    limit = limit_for(q_t, tolerance, mode)
    if not math.isfinite(q):
        return Verdict(FAILED, q, limit, math.nan, f"{metric} is not finite")
    margin = limit - (q - z * se)
    rule = (f"{metric}={q:.4g} (se {se:.2g}, student and teacher combined) vs limit {limit:.4g} "
            f"({mode} tolerance {tolerance:g}, z={z:g})")
    return Verdict(WITHIN if margin >= 0 else OVER, q, limit, margin, rule)


def choose(stages: list[dict]) -> dict | None:
    """The chosen student: the last stage within tolerance (the fewest steps that passed), else None."""
    passing = [s for s in stages if s["verdict"] == WITHIN]
    return min(passing, key=lambda s: (s["steps"], -s["index"])) if passing else None
