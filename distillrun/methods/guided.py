"""Guided distillation (Meng et al. 2023, "On Distillation of Guided Diffusion Models"): a classifier-free-guided
teacher, which pays two network evaluations per step, becomes ONE guidance-conditioned few-step student.

Guidance convention (as everywhere in distillrun, see distillrun.guidance): x_w = (1 + w) x(z, c) - w x(z, null),
w = 0 the plain conditional model; in the other common convention the scale is s = 1 + w.

Stage one ("guidance fit"): a copy of the teacher's network with a guidance-weight embedding (zero effect at the
start) learns, in one pass, the guided teacher's prediction at the same (x_t, t, label) for w drawn per example
from [w_min, w_max]; it samples with the teacher's step count at half the evaluations. Then progressive halving
(Salimans & Ho 2022, Alg. 2) of that w-conditioned student, w resampled per example in every batch, down to the
target steps or until the stop rule ends it.

Every stage is scored at a grid of guidance weights (see `evaluate_guided`): the reference at each w is the
guided teacher at full steps with the same sampler; classifier-free guidance does not sample the tilted density
p(x | c)^(1 + w) p(x)^(-w) of the clean data, so the data are not the reference here.
"""
from __future__ import annotations

import copy
import math
from dataclasses import dataclass, field, replace
from typing import Optional

import torch

from .. import evaluate, metrics, stopping
from ..denoiser import GuidanceCond, NetDenoiser, target_for
from ..distributed import current_shard
from ..guidance import Guided, WithWeight, stochastic_sample
from ..nets import fast_layout
from ..samplers import sample, uniform_grid
from ..training import train_loop
from . import Method, MethodConfig, StageJob, StageSpec, register, stage_loop_spec
from .teacher import draw_noisy

STUDENT_SAMPLERS = ("ddim", "stochastic")  # stochastic: Meng et al. 2023's 2-step-then-renoise sampler


@dataclass
class GuidedConfig(MethodConfig):
    """method=guided. Guidance weight w: x_w = (1 + w) x(z, c) - w x(z, null), w = 0 the conditional model
    (scale convention: s = 1 + w, so w_min=0, w_max=4 is s from 1 to 5). iterations, lr: per halving stage."""

    name: str = "guided"
    target_steps: int = 4  # halve down to this; teacher.steps / target_steps must be a power of two
    w_min: float = 0.0  # students are trained for w ~ U[w_min, w_max] per example and may only be asked inside it
    w_max: float = 4.0
    w_grid: list[float] = field(default_factory=lambda: [0.0, 1.0, 2.0, 4.0])  # every stage is scored at these w
    judge_w: Optional[float] = None  # the w the stop rule judges; null: the worst w of w_grid
    fit_iterations: int = 2500  # stage one (the guidance fit): 800 left up to 1.7x the RMS error at the ends of the w range
    fit_lr: float = 5e-4
    loss: str = "snr_trunc"  # halving loss weight: snr_trunc (max(SNR, 1)) | v (SNR + 1)
    sampler: str = "ddim"  # how students sample: ddim | stochastic (Meng et al. 2023: 2-step DDIM, re-noise 1 step)


def validate_config(cfg) -> None:
    """Checks of method=guided, before any work; raises config.ConfigError naming the key."""
    from ..config import ConfigError

    m = cfg.method
    for key in ("w_min", "w_max", "fit_lr", "lr"):
        if not math.isfinite(float(m[key])):
            raise ConfigError(f"method.{key}", m[key], "must be a finite number")
    if m.w_min < 0 or m.w_max <= m.w_min:
        raise ConfigError("method.w_max", m.w_max, f"must be above method.w_min={m.w_min} (>= 0): the w range is "
                          "empty or inverted (w = 0 is the conditional model; scale s = 1 + w)")
    grid = list(m.w_grid)
    if not grid or any(not (m.w_min <= w <= m.w_max) for w in grid) or len(set(grid)) != len(grid):
        raise ConfigError("method.w_grid", grid, f"must be distinct weights inside [w_min, w_max] = "
                          f"[{m.w_min:g}, {m.w_max:g}]")
    if m.judge_w is not None and m.judge_w not in grid:
        raise ConfigError("method.judge_w", m.judge_w, f"must be null (the worst w) or one of method.w_grid={grid}")
    if m.sampler not in STUDENT_SAMPLERS:
        raise ConfigError("method.sampler", m.sampler, f"must be one of {', '.join(STUDENT_SAMPLERS)}")
    if m.loss not in ("snr_trunc", "v"):
        raise ConfigError("method.loss", m.loss, "must be one of snr_trunc, v")
    ratio = cfg.teacher.steps / m.target_steps if m.target_steps > 0 else 0
    if m.target_steps < 1 or ratio != int(ratio) or ratio < 2 or int(ratio) & (int(ratio) - 1):
        raise ConfigError("method.target_steps", m.target_steps,
                          f"must be teacher.steps={cfg.teacher.steps} divided by a power of two >= 2")
    if not 0 <= m.ema_decay < 1:
        raise ConfigError("method.ema_decay", m.ema_decay, "must be in [0, 1)")
    for key in ("fit_iterations", "iterations", "batch_size"):
        if not m[key] >= 1:
            raise ConfigError(f"method.{key}", m[key], "must be >= 1")
    if cfg.teacher.source == "import":
        raise ConfigError("teacher.source", "import", "method=guided adds a guidance-weight embedding to the "
                          "teacher's network, so it needs a distillrun network: teacher.source=train or oracle")
    if not cfg.net.class_cond:
        raise ConfigError("net.class_cond", cfg.net.class_cond, "method=guided distils a class-conditional teacher: "
                          "set net.class_cond=true (and labelled data)")
    if cfg.teacher.source == "train" and cfg.teacher.label_dropout <= 0:
        raise ConfigError("teacher.label_dropout", cfg.teacher.label_dropout, "method=guided needs the unconditional "
                          "model too: train the teacher with label dropout in (0, 1), e.g. 0.15")
    if cfg.stop.metric not in ("sw2", "mmd2", "fd"):
        raise ConfigError("stop.metric", cfg.stop.metric, "method=guided scores students against the guided teacher's "
                          "samples, not the data's density: use sw2, mmd2 or fd (images)")


def check_request(meta: dict, label: int | None, w: float | None) -> None:
    """A draw request against what the student was trained for: the label among its classes, w inside
    [w_min, w_max]; ValueError with one line naming the option otherwise."""
    g = meta.get("guidance") or {}
    k = meta["net"]["num_classes"]
    if label is not None and not 0 <= label < k:
        raise ValueError(f"--label {label}: unknown label; valid: 0..{k - 1}")
    if w is not None and not (g.get("w_min", 0.0) <= w <= g.get("w_max", 0.0)):
        raise ValueError(f"--w {w:g}: outside the guidance weights this student was trained on, "
                         f"[{g.get('w_min', 0.0):g}, {g.get('w_max', 0.0):g}] (w = 0 is the conditional model)")


def w_student(previous: NetDenoiser) -> NetDenoiser:
    """A trainable guidance-conditioned copy of `previous`: the same network with a w-embedding whose effect starts
    at zero (stage one, from the teacher's network), or a plain copy when `previous` already has one."""
    net = previous.net
    arch = getattr(net, "arch", None)
    if arch is None or not hasattr(net, "embed"):
        raise ValueError("method=guided needs a distillrun network (net=mlp or net=unet) to add the guidance-weight "
                         "embedding to; an imported teacher cannot be distilled by it")
    if arch.get("guidance"):
        student = copy.deepcopy(previous)
    else:
        new = type(net)(**{**arch, "guidance": True}).to(next(net.parameters()).device)
        missing, unexpected = new.load_state_dict(net.state_dict(), strict=False)
        if unexpected or any(not k.startswith("embed.guidance_mlp") for k in missing):
            raise ValueError(f"the teacher's weights do not fit its guidance-conditioned copy "
                             f"(unexpected {unexpected[:2]}, missing {missing[:2]})")
        student = NetDenoiser(new, previous.parameterization, previous.schedule)
    return student.requires_grad_(True)


def w_key(w: float) -> str:
    """The name of a guidance weight inside metric names: w0, w1.5, w4 (metric name scheme: guided/w<w>/...)."""
    return f"w{float(w):g}"


def with_guidance_weights(draw, w_min: float, w_max: float):
    """A batch source whose labels become GuidanceCond(labels, w) with w ~ U[w_min, w_max] per example, drawn
    from the loop's generator after the batch (so a resumed stage draws the same weights)."""
    def draw_w(generator):
        x0, labels = draw(generator)
        w = w_min + (w_max - w_min) * torch.rand(x0.shape[0], generator=generator, dtype=torch.float64)
        return x0, GuidanceCond(labels, w.to(device=x0.device, dtype=x0.dtype))
    return draw_w


def guidance_fit_loss(teacher: Guided):
    """Stage one: mean squared error, in the student's output space, between the student's one-pass output at
    (x_t, t, label, w) and the guided teacher's (1 + w) x(z, c) - w x(z, null) (two evaluations), t ~ U(0, 1],
    x_t from the data (Meng et al. 2023, Sec. 4.1, first stage)."""
    def loss(model: NetDenoiser, target_model, batch, generator):
        x0, cond = batch
        t, _, alpha, sigma, x_t = draw_noisy(x0, model.schedule, generator)
        x0, cond, t, alpha, sigma, x_t = current_shard().local(x0, cond, t, alpha, sigma, x_t)
        with torch.no_grad():
            x0_w, eps_w = teacher.predict(x_t, t, cond)
        target = target_for(model.parameterization, x0_w, eps_w, alpha, sigma)
        return torch.mean((model(x_t, t, cond) - target) ** 2)
    return loss


def student_nfe(steps: int, kind: str = "ddim") -> int:
    """Network evaluations per sample of a student distilled for `steps` steps under sampler `kind`."""
    return 2 * steps if kind == "stochastic" else steps


def student_sampler(student, steps: int, w: float, kind: str = "ddim", seed: int = 0):
    """sample_fn(noise, labels) for a w-conditioned student distilled for `steps` steps. ddim: its own grid
    (steps evaluations). stochastic: Meng et al.'s sampler on a grid of 2 * steps, whose deterministic double-length
    steps are the ones this student was trained to take (2 * steps evaluations)."""
    den = WithWeight(student, w)
    if kind == "stochastic":
        def draw(noise, labels):
            return stochastic_sample(den, noise, 2 * steps, labels, torch.Generator().manual_seed(seed + steps))
        return draw
    return lambda noise, labels: sample(den, noise, uniform_grid(steps), "ddim", cond=labels)


def stage_plan(teacher_steps: int, target_steps: int) -> list[tuple[int, int]]:
    """(student steps, stage teacher's steps) per stage: the guidance fit at the teacher's steps, then halvings."""
    plan, steps = [(teacher_steps, teacher_steps)], teacher_steps
    while steps > target_steps:
        steps //= 2
        plan.append((steps, 2 * steps))
    return plan


def teacher_sampler(teacher, num_classes: int, steps: int, w: float, sampler: str = "ddim"):
    """sample_fn(noise, labels) for the guided teacher at `steps` steps (2 evaluations per step)."""
    den = Guided(teacher, num_classes, w)
    return lambda noise, labels: sample(den, noise, uniform_grid(steps), sampler, cond=labels,
                                        generator=torch.Generator().manual_seed(steps))


def baseline_steps(student_nfe: int) -> int:
    """Steps of the guided teacher that cost the student's evaluations (2 per step); at least 1 (2 evaluations)."""
    return max(student_nfe // 2, 1)


def per_label_fidelity(bench, x: torch.Tensor, labels: torch.Tensor) -> torch.Tensor | None:
    """p(intended label | sample) per sample: the exact posterior of the mixture (2D), or the feature network's
    classifier for labelled images; None when neither exists."""
    if bench.mixture is not None:
        return bench.mixture.responsibilities(x)[torch.arange(len(x)), labels].float()
    if bench.feature_net is not None and getattr(bench.feature_net, "arch", {}).get("n_classes", 0) > 0:
        with torch.no_grad():
            net = bench.feature_net  # features -> its classifier head (the feature network's training head)
            return torch.softmax(net.head(net(x.to(next(net.parameters()).device))), dim=1).cpu()[
                torch.arange(len(x)), labels].float()
    return None


def label_stats(bench, x: torch.Tensor, labels: torch.Tensor, num_classes: int) -> dict[str, float]:
    """fidelity (mean p(intended label | x)), diversity (root mean squared distance to the label's own mean: the
    spread within a label, sqrt of the trace of its covariance), both overall (mean over labels) and per label."""
    out: dict[str, float] = {}
    fid = per_label_fidelity(bench, x, labels)
    flat = x.flatten(1).double()
    divs, fids = [], []
    for c in range(num_classes):
        rows = labels == c
        if int(rows.sum()) < 2:
            continue
        xc = flat[rows]
        d = float(((xc - xc.mean(0)) ** 2).sum(1).mean().sqrt())
        out[f"label{c}/diversity"] = d
        divs.append(d)
        if fid is not None:
            out[f"label{c}/fidelity"] = float(fid[rows].mean())
            fids.append(out[f"label{c}/fidelity"])
    out["diversity"] = sum(divs) / len(divs) if divs else math.nan
    if fids:
        out["fidelity"] = sum(fids) / len(fids)
    return out


def guided_reference(bench, teacher, num_classes: int, teacher_steps: int, w_grid, sampler: str,
                     second_noise: torch.Tensor) -> dict:
    """Per w, the guided teacher at full steps on the bench's noise (the same-noise reference) and on a second,
    independent noise bank (the distribution a student is scored against; the teacher's own score against it is
    the finite-sample floor the stop rule compares with). Cached in bench.cache under 'guided@<w>' keys."""
    out = {}
    for w in w_grid:
        fn = teacher_sampler(teacher, num_classes, teacher_steps, w, sampler)
        same, _ = evaluate.cached_draw(bench, f"guided_teacher@{teacher_steps}/{w_key(w)}", fn)
        key = f"guided_reference@{teacher_steps}/{w_key(w)}"
        if key not in bench.cache:
            bench.cache[key] = evaluate.draw(fn, replace(bench, noise=second_noise, cache={}))
        out[w] = (same, bench.cache[key])
    return out


def bench_for(bench, reference: torch.Tensor):
    """A copy of the run's bench whose reference set is `reference` (guided-teacher samples) and without the
    data's density (nll_gap and mode coverage score the data, not a guided teacher)."""
    feats = None
    if bench.feature_net is not None:
        from ..features import features
        feats = features(bench.feature_net, reference)
    ref = feats if feats is not None else reference
    return replace(bench, reference=reference, reference_feats=feats, mixture=None, entropy=None,
                   reference_within=None, cache={}, bandwidth=metrics.median_bandwidth(ref, ref, seed=bench.seed))


def score(bench_w, bench, x, same_noise_teacher, labels, num_classes) -> dict[str, float]:
    """Quality against the guided reference, same-noise distance to the guided teacher, fidelity and diversity."""
    out = evaluate.quality(bench_w, x)
    d = evaluate.divergence(bench, x, same_noise_teacher, "teacher")
    out.update({k.removeprefix("divergence/"): v for k, v in d.items()})
    out.update(label_stats(bench, x, labels, num_classes))
    return out


def evaluate_guided(bench, sample_student, teacher, num_classes: int, nfe: int, teacher_steps: int, w_grid,
                    reference: dict, baseline: bool = True) -> dict[str, float]:
    """All per-w metrics of a student whose sampler costs `nfe` evaluations per sample, named
    guided/w<w>/{student,baseline,teacher}/<metric> and guided/w<w>/{...}/label<c>/<metric>, with nfe entries:
      sw2, mmd2 (+ _se): against the guided teacher's full-step samples from independent noise
      teacher_rms, teacher_median, teacher_p90, teacher_switch: same-noise distance to the guided teacher
      fidelity: mean p(intended label | sample); diversity: spread within a label
    sample_student(w) -> sample_fn(noise, labels)."""
    labels = bench.cond
    out: dict[str, float] = {}
    for w in w_grid:
        same, ref = reference[w]
        bench_w = bench_for(bench, ref)
        k = f"guided/{w_key(w)}"
        x = evaluate.draw(sample_student(w), bench)
        for name, v in score(bench_w, bench, x, same, labels, num_classes).items():
            out[f"{k}/student/{name}"] = v
        out[f"{k}/student/nfe"] = float(nfe)
        for name, v in score(bench_w, bench, same, same, labels, num_classes).items():
            if not name.startswith("teacher_"):
                out[f"{k}/teacher/{name}"] = v
        out[f"{k}/teacher/nfe"] = float(2 * teacher_steps)
        if baseline:
            b_steps = baseline_steps(nfe)
            base = evaluate.cached_draw(bench, f"guided_teacher@{b_steps}/{w_key(w)}",
                                        teacher_sampler(teacher, num_classes, b_steps, w, "ddim"))[0]
            for name, v in score(bench_w, bench, base, same, labels, num_classes).items():
                out[f"{k}/baseline/{name}"] = v
            out[f"{k}/baseline/nfe"] = float(2 * b_steps)
    return out


def judge_guided(metrics_: dict, w_grid, metric: str, tolerance: float, mode: str, z: float,
                 judge_w: float | None) -> tuple[stopping.Verdict, float]:
    """The stop rule at each w of the grid (student's `metric` against the guided reference vs the teacher's own
    value there); the verdict of the chosen w, or of the worst w (smallest margin) when judge_w is None."""
    verdicts = {}
    for w in ([judge_w] if judge_w is not None else w_grid):
        k = f"guided/{w_key(w)}"
        q = {m: metrics_.get(f"{k}/student/{m}", math.nan) for m in (metric, f"{metric}_se")}
        t = {m: metrics_.get(f"{k}/teacher/{m}", math.nan) for m in (metric, f"{metric}_se")}
        v = stopping.judge(q, t, metric, tolerance, mode, z)
        verdicts[w] = replace(v, reason=f"at w={w:g}: {v.reason}")
    order = {stopping.FAILED: 0, stopping.OVER: 1, stopping.WITHIN: 2}
    w_worst = min(verdicts, key=lambda w: (order[verdicts[w].verdict],
                                           verdicts[w].margin if math.isfinite(verdicts[w].margin) else -math.inf))
    return verdicts[w_worst], w_worst


# ------------------------------------------------------------------------------------- pipeline glue
SECOND_BANK_OFFSET = 7919  # the independent noise bank of the guided reference: seed eval.seed + this


def evaluate_stage(cfg, bench, steps: int, student, teacher_denoiser, num_classes: int) -> tuple[dict, float]:
    """Per-w metrics of a stage (see evaluate_guided) plus the judged w's under the generic names quality/<m>,
    baseline/<m>, divergence/teacher_* (so tables and plots across methods line up), and the judged w itself."""
    m = cfg.method
    second = torch.randn(bench.noise.shape, generator=torch.Generator().manual_seed(cfg.eval.seed + SECOND_BANK_OFFSET))
    grid = [float(w) for w in m.w_grid]
    ref = guided_reference(bench, teacher_denoiser, num_classes, cfg.teacher.steps, grid, cfg.teacher.sampler, second)
    nfe = student_nfe(steps, m.sampler)
    out = evaluate_guided(bench, lambda w: student_sampler(student, steps, w, m.sampler, cfg.eval.seed),
                          teacher_denoiser, num_classes, nfe, cfg.teacher.steps, grid, ref, cfg.eval.baseline)
    verdict, w = judge_guided(out, grid, cfg.stop.metric, cfg.stop.tolerance, cfg.stop.mode, cfg.stop.z,
                              None if m.judge_w is None else float(m.judge_w))
    k = f"guided/{w_key(w)}"
    for part, prefix in (("student", "quality"), ("baseline", "baseline")):
        for name in ("sw2", "sw2_se", "mmd2", "mmd2_se", "fd", "fd_se"):
            if f"{k}/{part}/{name}" in out:
                out[f"{prefix}/{name}"] = out[f"{k}/{part}/{name}"]
    for name in ("rms", "median", "p90", "switch"):
        if f"{k}/student/teacher_{name}" in out:
            out[f"divergence/teacher_{name}"] = out[f"{k}/student/teacher_{name}"]
    out["guided/judged_w"] = w
    return out, w


def verdict_of(cfg, metrics_: dict) -> stopping.Verdict:
    """The stop rule over the w grid, from a stage's recorded metrics (re-judged on resume)."""
    grid = [float(w) for w in cfg.method.w_grid]
    return judge_guided(metrics_, grid, cfg.stop.metric, cfg.stop.tolerance, cfg.stop.mode, cfg.stop.z,
                        None if cfg.method.judge_w is None else float(cfg.method.judge_w))[0]


def meta_for(cfg, arch: dict) -> dict:
    """What a saved guided student needs beyond the teacher's: its network has the w-embedding, and the w range
    it was trained on (draw refuses weights outside it)."""
    kwargs = {**arch.get("kwargs", {}), "guidance": True}
    return {"net": {**arch, "kwargs": kwargs},
            "guidance": {"w_min": float(cfg.method.w_min), "w_max": float(cfg.method.w_max),
                         "w_grid": [float(w) for w in cfg.method.w_grid], "sampler": cfg.method.sampler}}


def per_w_table(summary: dict) -> str:
    """The terminal table of a guided run: every stage at every w of the grid, with NFE."""
    rows = []
    metric = summary["stop_metric"]
    head = (f"{'stage':>5} {'w':>4} {'NFE':>4}  {'student ' + metric:>14} {'teacher ' + metric:>14}  "
            f"{'rms to teacher':>14}  {'baseline NFE':>12} {'baseline ' + metric:>15} {'baseline rms':>12}  "
            f"{'fidelity':>8} {'diversity':>9} {'teacher div':>11}")
    rows.append(head)
    rows.append("-" * len(head))
    for r in summary["stages"]:
        m = r["metrics"]
        for key in sorted({k.split("/")[1] for k in m if k.startswith("guided/w")}, key=lambda s: float(s[1:])):
            p = f"guided/{key}"
            g = lambda name: m.get(f"{p}/{name}", math.nan)  # noqa: E731
            rows.append(f"{r['index']:>5} {key[1:]:>4} {g('student/nfe'):>4.0f}  {g(f'student/{metric}'):>14.4g} "
                        f"{g(f'teacher/{metric}'):>14.4g}  {g('student/teacher_rms'):>14.4g}  "
                        f"{g('baseline/nfe'):>12.0f} {g(f'baseline/{metric}'):>15.4g} {g('baseline/teacher_rms'):>12.4g}  "
                        f"{g('student/fidelity'):>8.4f} {g('student/diversity'):>9.4f} {g('teacher/diversity'):>11.4f}")
    return "\n".join(rows)


def fidelity_diversity_plot(summary: dict, path) -> None:
    """Fidelity (x) against diversity (y) over the w grid, for the guided teacher at full steps and the chosen
    student (or the last stage when none is chosen), each point labelled with its w and NFE."""
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from .. import checkpoint

    if not summary["stages"]:
        return
    chosen = summary.get("chosen")
    row = next((r for r in summary["stages"] if chosen and r["index"] == chosen["index"]), summary["stages"][-1])
    m = row["metrics"]
    keys = sorted({k.split("/")[1] for k in m if k.startswith("guided/w")}, key=lambda s: float(s[1:]))
    fig, ax = plt.subplots(figsize=(5.5, 4.2))
    for who, marker in (("teacher", "s"), ("student", "o")):
        xs = [m.get(f"guided/{k}/{who}/fidelity", math.nan) for k in keys]
        ys = [m.get(f"guided/{k}/{who}/diversity", math.nan) for k in keys]
        nfe = m.get(f"guided/{keys[0]}/{who}/nfe", math.nan) if keys else math.nan
        name = "guided teacher" if who == "teacher" else f"student (stage {row['index']})"
        ax.plot(xs, ys, marker=marker, label=f"{name}, {nfe:.0f} NFE")
        for k, x, y in zip(keys, xs, ys):
            ax.annotate(k, (x, y), textcoords="offset points", xytext=(4, 4), fontsize=8)
    ax.ticklabel_format(axis="x", useOffset=False)  # fidelities near 1 differ in the 5th digit: print them whole
    ax.set_xlabel("label fidelity: mean p(intended label | sample)")
    ax.set_ylabel("diversity: spread within a label")
    ax.set_title("guidance: fidelity vs diversity over w")
    ax.legend(fontsize=8)
    fig.tight_layout()
    import io
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=110)
    plt.close(fig)
    checkpoint.atomic_write_bytes(path, buf.getvalue())


def per_w_curves(runs: list[tuple[str, dict]], metric: str, path) -> bool:
    """For `compare`: one panel per guidance weight, `metric` against NFE for every guided run's stages (student)
    and their same-NFE guided-teacher baselines, with the teacher at full steps as a marker. False when no run
    is guided (nothing drawn)."""
    import io

    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from .. import checkpoint

    guided_runs = [(label, s) for label, s in runs if s.get("method") == "guided" and s["stages"]]
    if not guided_runs:
        return False
    keys = sorted({k.split("/")[1] for _, s in guided_runs for r in s["stages"] for k in r["metrics"]
                   if k.startswith("guided/w")}, key=lambda s: float(s[1:]))
    fig, axes = plt.subplots(1, len(keys), figsize=(3.6 * len(keys), 3.4), squeeze=False)
    for ax, key in zip(axes[0], keys):
        for label, s in guided_runs:
            rows = [r for r in s["stages"] if f"guided/{key}/student/{metric}" in r["metrics"]]
            get = lambda r, who, name: r["metrics"].get(f"guided/{key}/{who}/{name}", math.nan)  # noqa: E731
            line = ax.plot([get(r, "student", "nfe") for r in rows], [get(r, "student", metric) for r in rows],
                           marker="o", label=f"{label} student")[0]
            ax.plot([get(r, "baseline", "nfe") for r in rows], [get(r, "baseline", metric) for r in rows],
                    marker="s", linestyle="--", color=line.get_color(), alpha=0.6, label=f"{label} guided DDIM")
            if rows:
                ax.plot([get(rows[0], "teacher", "nfe")], [get(rows[0], "teacher", metric)], marker="*",
                        markersize=11, color=line.get_color(), linestyle="", label=f"{label} teacher, full steps")
        ax.set_xscale("log", base=2)
        ax.set_yscale("log")
        ax.set_xlabel("network evaluations per sample (NFE)")
        ax.set_title(f"w = {key[1:]}")
    axes[0][0].set_ylabel(f"{metric} to the guided teacher's samples")
    axes[0][-1].legend(fontsize=7)
    fig.tight_layout()
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=100)
    plt.close(fig)
    checkpoint.atomic_write_bytes(path, buf.getvalue())
    return True


# ------------------------------------------------------------------------------------- the method
class GuidedMethod(Method):
    """method=guided: stage one (guidance fit), then progressive halving of the w-conditioned student."""
    name = "guided"
    config = GuidedConfig
    chains_teacher = True  # stage one learns from the guided teacher; every later stage from the previous student

    def validate(self, cfg) -> None:
        validate_config(cfg)

    def plan(self, cfg) -> list[StageSpec]:
        plan = stage_plan(cfg.teacher.steps, cfg.method.target_steps)
        return [StageSpec(i + 1, n, tn, cfg.method.fit_iterations if i == 0 else cfg.method.iterations)
                for i, (n, tn) in enumerate(plan)]

    def make_student(self, cfg, previous, data):
        """Stage one: the teacher's network plus a w-embedding with no effect yet; later: a copy of the previous."""
        return fast_layout(w_student(previous), in_place=True)

    def loss(self, cfg, job: StageJob):
        if job.spec.index == 1:
            return guidance_fit_loss(Guided(fast_layout(job.teacher), job.data.num_classes))
        from .progressive import progressive_loss
        return progressive_loss(fast_layout(job.teacher), job.spec.steps, cfg.method.loss)

    def train(self, cfg, job: StageJob):
        m = cfg.method
        spec = stage_loop_spec(cfg, job.spec)
        desc = f"stage {job.spec.index} ({job.spec.steps} steps)"
        if job.spec.index == 1:
            spec, desc = replace(spec, lr=m.fit_lr), f"stage 1 (guidance fit, {job.spec.steps} steps)"
        draw = with_guidance_weights(job.data.batches(m.batch_size, job.device), float(m.w_min), float(m.w_max))
        return train_loop(job.student, self.loss(cfg, job), draw, spec, generator=job.generator,
                          state_path=job.state_path, desc=desc, quiet=job.quiet)

    def sampler(self, method_cfg, student, steps, seed):
        """At the judged w (method.judge_w, else the largest w of the grid); `draw --w` picks any w in range."""
        w = method_cfg.judge_w if method_cfg.judge_w is not None else max(method_cfg.w_grid)
        return student_sampler(student, steps, float(w), method_cfg.sampler, seed)

    def save_meta(self, method_cfg, student) -> dict:
        return {"guidance": {"w_min": float(method_cfg.w_min), "w_max": float(method_cfg.w_max),
                             "w_grid": [float(w) for w in method_cfg.w_grid], "sampler": method_cfg.sampler}}

    def rebuild(self, denoiser, meta: dict):
        return w_student(denoiser).requires_grad_(False)

    def evaluate(self, cfg, bench, spec, student, teacher_denoiser, num_classes):
        return evaluate_stage(cfg, bench, spec.steps, student, teacher_denoiser, num_classes)[0]

    def judge(self, cfg, metrics_):
        return verdict_of(cfg, metrics_)

    def summary_plots(self, summary, run_dir):
        path = run_dir / "guided_fidelity_diversity.png"
        fidelity_diversity_plot(summary, path)
        return [path]


register(GuidedMethod())
