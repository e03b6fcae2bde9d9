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
    higher_better: bool = False  # falls when quality is lost (the stop rule's limit lies below the teacher's value)
    share: bool = False  # a share of points (0..1): may sit in the stop panel, whose one tolerance is a share


METRIC_PROPS: dict[str, MetricProps] = {
    "sw2": MetricProps("sliced Wasserstein-2 to held-out data", log_scale=True),
    "mmd2": MetricProps("unbiased MMD^2, RBF kernel at the median bandwidth", signed=True),
    "mmd2_div4": MetricProps("unbiased MMD^2, RBF kernel at a quarter of the median bandwidth", signed=True),
    "mmd2_div16": MetricProps("unbiased MMD^2, RBF kernel at 1/16 of the median bandwidth", signed=True),
    "precision": MetricProps(share=True, meaning="share of samples inside the 5-NN ball of some data point (on the data manifold)",
                             higher_better=True),
    "recall": MetricProps(share=True, meaning="share of data points inside the 5-NN ball of some sample", higher_better=True),
    "density": MetricProps("data 5-NN balls holding each sample, averaged, over 5 (1 for exact samples)",
                           higher_better=True),
    "coverage": MetricProps(share=True, meaning="share of data points whose 5-NN ball holds a sample (falls when modes drop)",
                            higher_better=True),
    "c2st": MetricProps(share=True, meaning="held-out accuracy of a k-NN classifier telling samples from data (0.5: indistinguishable)"),
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
