"""Pictures and tables: sample pictures per stage, quality versus steps, the terminal stage table."""
from __future__ import annotations

import io
import math
from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import torch  # noqa: E402

from . import checkpoint  # noqa: E402
from .metric_props import METRIC_PROPS  # noqa: E402

SCATTER_POINTS = 2000  # points drawn in 2D scatter plots (more only blurs the picture)


def _save(fig, path: Path) -> None:
    """Render to memory, then the one atomic writer (a kill never leaves half a picture)."""
    buf = io.BytesIO()
    fig.savefig(buf, format=Path(path).suffix.lstrip(".") or "png", dpi=110, bbox_inches="tight")
    plt.close(fig)
    checkpoint.atomic_write_bytes(path, buf.getvalue())


def image_grid(x: torch.Tensor, rows: int = 8, cols: int = 8, gap: int = 1) -> torch.Tensor:
    """(N, C, H, W) in [-1, 1] -> one (rows*(H+gap), cols*(W+gap)) picture in [0, 1] (first channel or RGB);
    a mid-grey `gap` of pixels right of and below each image keeps dark-background images apart."""
    x = x[: rows * cols].clamp(-1, 1).add(1).div(2)
    n, c, h, w = x.shape
    x = torch.cat([x, torch.ones(rows * cols - n, c, h, w)])
    x = torch.nn.functional.pad(x, (0, gap, 0, gap), value=0.5)
    h, w = h + gap, w + gap
    x = x.reshape(rows, cols, c, h, w).permute(0, 3, 1, 4, 2).reshape(rows * h, cols * w, c)
    return x[..., 0] if c == 1 else x


def sample_picture(x: torch.Tensor, bench, path: Path, title: str) -> None:
    """Scatter (2D: samples over the data) or image grid of a stage's samples."""
    fig, ax = plt.subplots(figsize=(4.2, 4.2))
    if x.dim() == 4:
        ax.imshow(image_grid(x).numpy(), cmap="gray", vmin=0, vmax=1)
        ax.axis("off")
    else:
        ref = bench.reference[:SCATTER_POINTS]
        ax.scatter(ref[:, 0], ref[:, 1], s=2, c="0.75", label="data")
        ax.scatter(x[:SCATTER_POINTS, 0], x[:SCATTER_POINTS, 1], s=2, c="tab:blue", label="samples")
        ax.set_aspect("equal")
        ax.set_xlim(-3, 3), ax.set_ylim(-3, 3)
        ax.legend(loc="upper right", markerscale=4, fontsize=8)
    ax.set_title(title, fontsize=9)
    _save(fig, path)


def quality_vs_steps(summaries: list[tuple[str, dict]], metric: str, path: Path) -> None:
    """Students and the teacher's DDIM baseline versus steps (log2 axis), with error bars, teacher and floor."""
    fig, ax = plt.subplots(figsize=(6, 4))
    for label, s in summaries:
        rows = [r for r in s["stages"] if r["metrics"]]
        steps = [r["steps"] for r in rows]
        ax.errorbar(steps, [r["metrics"].get(f"quality/{metric}", math.nan) for r in rows],
                    yerr=[r["metrics"].get(f"quality/{metric}_se", 0) for r in rows], marker="o", capsize=3,
                    label=f"{label} student")
        if rows and f"baseline/{metric}" in rows[0]["metrics"]:
            ax.errorbar(steps, [r["metrics"][f"baseline/{metric}"] for r in rows],
                        yerr=[r["metrics"].get(f"baseline/{metric}_se", 0) for r in rows], marker="s",
                        linestyle="--", capsize=3, label=f"{label} teacher DDIM (baseline)")
    ref = summaries[0][1]["reference"]
    ax.axhline(ref["teacher"][metric], color="k", lw=1, label=f"teacher at {ref.get('steps', '?')} steps")
    ax.axhline(ref["floor"][metric], color="0.6", lw=1, linestyle=":", label="floor (data vs data)")
    ax.set_xscale("log", base=2)
    if METRIC_PROPS.get(metric) is not None and METRIC_PROPS[metric].log_scale:
        ax.set_yscale("log")
    ax.set_xlabel("sampler steps (NFE)")
    ax.set_ylabel(metric)
    ax.legend(fontsize=7)
    ax.grid(alpha=0.3)
    _save(fig, path)


def write_plots(summary: dict, run_dir: Path) -> list[Path]:
    path = run_dir / "quality_vs_steps.png"
    quality_vs_steps([(summary["method"], summary)], summary["stop_metric"], path)
    return [path]


def stage_table(summary: dict) -> str:
    """The terminal table printed at the end of a run."""
    metric = summary["stop_metric"]
    ref = summary["reference"]
    head = f"{'stage':>5} {'steps':>5}  {metric + ' ± se':>18}  {'DDIM baseline':>13}  {'diverg. rms':>11}  " \
           f"{'verdict':>7}  {'seconds':>7}"
    lines = [head, "-" * len(head),
             f"{'teach':>5} {ref.get('steps', 0):>5}  {_pm(ref['teacher'], metric):>18}  {'':>13}  {'':>11}  "
             f"{'':>7}  {'':>7}"]
    for r in summary["stages"]:
        m = r["metrics"]
        secs = r["seconds"]["train"] + r["seconds"]["eval"]
        lines.append(f"{r['index']:>5} {r['steps']:>5}  {_pm(m, metric, 'quality/'):>18}  "
                     f"{m.get(f'baseline/{metric}', math.nan):>13.4g}  {m.get('divergence/teacher_rms', math.nan):>11.4g}  "
                     f"{r['verdict']:>7}  {secs:>7.1f}")
    chosen = summary["chosen"]
    lines.append(f"floor ({metric}, data vs data): {ref['floor'][metric]:.4g}")
    lines.append(f"stopped: {summary['stopped_because']}")
    lines.append("chosen student: " + (f"stage {chosen['index']} at {n_steps(chosen['steps'])} ({chosen['folder']})"
                                       if chosen else "none within tolerance"))
    return "\n".join(lines)


def n_steps(n: int) -> str:
    """'1 step', '4 steps'."""
    return f"{n} step" if n == 1 else f"{n} steps"


def _pm(m: dict, metric: str, prefix: str = "") -> str:
    v, se = m.get(f"{prefix}{metric}", math.nan), m.get(f"{prefix}{metric}_se", math.nan)
    return f"{v:.4g} ± {se:.2g}"


def load_summary(run_dir: Path) -> dict:
    return checkpoint.read_json(Path(run_dir) / "summary.json", {"stages": list, "reference": dict})


def divergence_vs_steps(runs: list[tuple[str, dict]], path: Path) -> None:
    """Same-noise divergence from the original teacher per stage: RMS (solid) and median (dashed), log axes.
    `runs`: (legend label, summary) pairs."""
    fig, ax = plt.subplots(figsize=(6, 4))
    for i, (label, s) in enumerate(runs):
        rows = [r for r in s["stages"] if r["metrics"]]
        steps = [r["steps"] for r in rows]
        color = f"C{i % 10}"
        for key, style in (("rms", "-"), ("median", "--")):
            ax.plot(steps, [r["metrics"].get(f"divergence/teacher_{key}", math.nan) for r in rows], style,
                    marker="o", color=color, label=f"{label}: {key}")
    ax.set_xscale("log", base=2)
    ax.set_yscale("log")
    ax.set_xlabel("sampler steps (NFE)")
    ax.set_ylabel("distance to the teacher's sample (same noise)")
    ax.set_title("divergence from the teacher at full steps", fontsize=9)
    ax.legend(fontsize=7)
    ax.grid(alpha=0.3, which="both")
    _save(fig, path)


def samples_side_by_side(runs: list[tuple[str, Path]], summaries: list[dict], path: Path, cols: int = 4) -> None:
    """The stages' samples.png pictures in one figure: each run starts a new row, `cols` stages per row."""
    import matplotlib.image as mpimg

    cols = max(1, min(cols, max(len(s["stages"]) for s in summaries)))
    cells = []  # (run label, stage record, picture path), one row block per run
    for (label, run_dir), s in zip(runs, summaries):
        block = [(label, r, Path(run_dir) / f"stage-{r['index']:02d}" / "samples.png") for r in s["stages"]]
        cells += block + [None] * (-len(block) % cols)
    rows = max(1, math.ceil(len(cells) / cols))
    fig, axes = plt.subplots(rows, cols, figsize=(3.2 * cols, 3.4 * rows), squeeze=False)
    for ax, cell in zip(axes.flat, cells + [None] * (rows * cols - len(cells))):
        ax.axis("off")
        if cell is None:
            continue
        label, r, picture = cell
        if picture.exists():
            ax.imshow(mpimg.imread(picture))
        else:
            ax.text(0.5, 0.5, f"stage {r['index']}: {r['verdict']}\n(no samples)", ha="center", va="center")
        if len(runs) > 1:
            ax.set_title(label, fontsize=8)
    fig.tight_layout()
    _save(fig, path)


# ------------------------------------------------------------------------ the table of `distillrun compare`
def _num(v, fmt=".4g") -> str:
    return "" if v is None or (isinstance(v, float) and math.isnan(v)) else format(v, fmt)


def compare_rows(label: str, s: dict, metric: str) -> list[list[str]]:
    ref = s["reference"]
    pm = lambda m, p: f"{_num(m.get(p + metric))} ± {_num(m.get(p + metric + '_se'), '.2g')}"  # noqa: E731
    rows = [[label, s["method"], "teacher", str(ref.get("steps", "")), pm(ref["teacher"], ""), "", "", "", "", ""]]
    for r in s["stages"]:
        m = r["metrics"]
        rows.append([label, r["method"], str(r["index"]), str(r["steps"]), pm(m, "quality/") if m else "",
                     _num(m.get(f"baseline/{metric}")), _num(m.get("divergence/teacher_rms")),
                     _num(m.get("divergence/teacher_median")), r["verdict"],
                     f"{r['seconds']['train'] + r['seconds']['eval']:.1f}"])
    return rows


def format_table(head: list[str], rows: list[list[str]]) -> str:
    widths = [max(len(x) for x in col) for col in zip(head, *rows)]
    line = lambda cells: "  ".join(c.ljust(w) if i < 3 else c.rjust(w)  # noqa: E731
                                   for i, (c, w) in enumerate(zip(cells, widths))).rstrip()
    return "\n".join([line(head), "-" * len(line(head))] + [line(r) for r in rows])


def comparison_table(runs: list[tuple[str, dict]], metric: str) -> str:
    """`distillrun compare`'s table: per run a teacher row and one row per stage, then a note with the floor,
    the chosen student and why the run stopped. Empty cells: not measured (a failed stage, no baseline)."""
    head = ["run", "method", "stage", "steps", f"{metric} ± se", "DDIM baseline", "diverg. rms", "diverg. median",
            "verdict", "seconds"]
    table = format_table(head, [row for label, s in runs for row in compare_rows(label, s, metric)])
    notes = []
    for label, s in runs:
        c = s["chosen"]
        chosen = f"stage {c['index']} at {n_steps(c['steps'])}" if c else "none within tolerance"
        notes.append(f"{label}: floor {metric} {_num(s['reference']['floor'].get(metric))}; chosen {chosen}; "
                     f"stopped: {s['stopped_because']}")
    return table + "\n" + "\n".join(notes)
