"""One table of what each quality metric is, read by validation, the stop rule, reports and plots.

A metric's name here is the name after `quality/`, `baseline/`, `teacher/` and `floor/` everywhere else.
Add a metric by computing it in evaluate.quality() and adding its row here; nothing else names metrics.
"""
from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class MetricProps:
    meaning: str  # one line, shown in errors and help
    images_only: bool = False  # needs the feature network of image data
    needs_density: bool = False  # needs a known data density (data with an exact mixture)
    signed: bool = False  # hovers around 0 and can go negative: judged by an absolute tolerance only
    by_size: bool = False  # both signs mean worse: the stop rule compares its size |q|
    log_scale: bool = False  # plotted on a log axis (a positive distance spanning decades)
    stop_metric: bool = True  # may decide the stop rule (has a standard error and a teacher value)


METRIC_PROPS: dict[str, MetricProps] = {
    "sw2": MetricProps("sliced Wasserstein-2 to held-out data", log_scale=True),
    "mmd2": MetricProps("unbiased MMD^2, RBF kernel at the median bandwidth", signed=True),
    "fd": MetricProps("Frechet distance in the feature space of image data", images_only=True, log_scale=True),
    "nll_gap": MetricProps("mean -log p(sample) minus the entropy of p, in nats", needs_density=True, signed=True,
                           by_size=True),
    "mode_tv": MetricProps("total variation of the share of samples per mode", needs_density=True,
                           stop_metric=False),
    "modes_dropped": MetricProps("modes receiving under 25% of their share", needs_density=True, stop_metric=False),
}


def available(metric: str, images: bool, known_density: bool) -> bool:
    """Can `metric` be computed on data of this kind?"""
    p = METRIC_PROPS[metric]
    return (images or not p.images_only) and (known_density or not p.needs_density)


def stop_metrics() -> list[str]:
    return [name for name, p in METRIC_PROPS.items() if p.stop_metric]
