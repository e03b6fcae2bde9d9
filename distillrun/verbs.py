"""The verbs beside the run command. `main(verb, argv)` parses, runs, and turns bad input into one line, exit 2.

  distillrun recipes [NAME]                                  every recipe: purpose, CPU time, command; NAME: its YAML
  distillrun draw RUN_DIR [--stage N] [--beside-teacher] [--count N] [--seed S] [--out PATH] [--label C] [--w W]
                                                                                             (--stage 0: teacher)
  distillrun compare RUN_DIR [RUN_DIR ...] [--metric M] [--out DIR]
  distillrun merge RUN_DIR [--stage N] [--out DIR]            an adapter student as one full network

`draw` with --seed S and --count N feeds a stage the evaluation noise bank of eval.seed=S, eval.samples=N,
so with the defaults (the run's own eval.seed and eval.samples) it repeats the samples the stage was scored on.
"""
from __future__ import annotations

import argparse
import io
import sys
from pathlib import Path
from types import SimpleNamespace

EXIT_BAD_INPUT = 2
HEADER_KEYS = ("Purpose", "Command", "CPU time")


class InputError(ValueError):
    """Bad arguments or an unusable run folder; str() is the one line shown to the user."""


class _Parser(argparse.ArgumentParser):
    def error(self, message):  # argparse prints usage + message over two lines; we want one
        raise InputError(f"{message} (see distillrun {self.prog.split()[-1]} --help)")


# ------------------------------------------------------------------------------------------------ recipes
def recipe_header(path: Path) -> dict:
    """Purpose (one paragraph), Command (a list of lines) and CPU time from a recipe's leading comment block;
    an indented comment line continues the field above it."""
    fields, key = {}, None
    for line in path.read_text().splitlines():
        if not line.startswith("#"):
            break
        text = line[1:].strip()
        head, sep, rest = text.partition(":")
        if sep and head in HEADER_KEYS:
            key, fields[head] = head, [rest.strip()]
        elif key and text and line[1:].startswith("  "):
            fields[key].append(text)
        else:
            key = None
    out = {k: " ".join(" ".join(v).split()) for k, v in fields.items()}
    if "Command" in fields:
        out["Command"] = [" ".join(c.split()) for c in fields["Command"]]
    return out


def recipe_names() -> list[str]:
    from .config import recipe_files

    return [Path(p.name).stem for p in recipe_files()]


def recipe_path(name: str):
    from importlib.resources import files

    return files("distillrun.recipes").joinpath(f"{name}.yaml")


def first_sentence(text: str) -> str:
    head, sep, _ = text.partition(". ")
    return head + "." if sep else text


def cmd_recipes(args) -> int:
    names = recipe_names()
    if args.name is not None:
        if args.name not in names:
            raise InputError(f"recipe '{args.name}' not found; valid: {', '.join(names)}")
        path = recipe_path(args.name)
        print(f"# {path}\n{path.read_text()}", end="")
        return 0
    print(f"{len(names)} recipes. Run one: distillrun recipe=NAME   Its YAML and details: distillrun recipes NAME\n")
    for name in names:
        h = recipe_header(recipe_path(name))
        print(f"{name}: {first_sentence(h.get('Purpose', '(no purpose stated)'))}")
        print(f"    CPU time: {h.get('CPU time', 'not stated')}")
        lines, prefix = h.get("Command", [f"distillrun recipe={name}"]), "$ "
        for line in lines:
            print(f"    {prefix}{line}")
            prefix = "    " if line.endswith("\\") else "$ "
        print()
    return 0


# ------------------------------------------------------------------------------------------- run folders
def open_run(run_dir: Path) -> tuple[object, dict | None]:
    """(resolved config, summary or None) of a run folder."""
    from omegaconf import OmegaConf

    from . import report

    if not run_dir.is_dir():
        raise InputError(f"RUN_DIR {run_dir}: no such folder (give the run_dir of a distillrun run)")
    if not (run_dir / "config.yaml").is_file():
        raise InputError(f"RUN_DIR {run_dir}: not a run folder (no config.yaml)")
    try:
        cfg = OmegaConf.load(run_dir / "config.yaml")
    except Exception:
        raise InputError(f"{run_dir / 'config.yaml'}: not a readable YAML config") from None
    return cfg, report.load_summary(run_dir) if (run_dir / "summary.json").exists() else None


def finished_stages(run_dir: Path) -> list[int]:
    from . import checkpoint

    out = []
    for folder in sorted(run_dir.glob("stage-[0-9][0-9]")):
        if (folder / "metrics.json").exists() and checkpoint.read_json(folder / "metrics.json").get("failed") is None:
            out.append(int(folder.name[6:]))
    return out


def pick_stage(run_dir: Path, summary: dict | None, stage: int | None) -> Path:
    """The chosen student's folder, or stage N's; refuses missing, unfinished and failed stages."""
    valid = finished_stages(run_dir)
    hint = f"finished stages: {', '.join(map(str, valid)) or 'none'}"
    if stage is None:
        if summary is None:
            raise InputError(f"RUN_DIR {run_dir}: no summary.json yet (unfinished run); pass --stage N ({hint})")
        if not summary.get("chosen"):
            raise InputError(f"RUN_DIR {run_dir}: no chosen student (no stage within tolerance); pass --stage N ({hint})")
        stage = summary["chosen"]["index"]
    if stage not in valid:
        from . import checkpoint

        metrics = run_dir / f"stage-{stage:02d}" / "metrics.json"
        why = f"failed ({checkpoint.read_json(metrics)['failed']})" if metrics.exists() else "does not exist or is unfinished"
        raise InputError(f"--stage {stage}: that stage {why}; {hint}")
    return run_dir / f"stage-{stage:02d}"


def rebuild_student(folder: Path) -> tuple[object, dict]:
    """The saved network of a stage (or of the teacher/ folder) as the pipeline sampled it: a NetDenoiser,
    wrapped by its method's `rebuild` for a stage. An adapter student's folder holds the adapter alone: the
    network is its base teacher (the run's teacher/ folder, or the imported teacher's weights) plus that adapter,
    refused when the teacher's content hash differs from the one the adapter names."""
    from . import adapters, checkpoint, teachers
    from .denoiser import NetDenoiser
    from .methods import METHODS
    from .schedule import Schedule

    state, meta = checkpoint.load_model_files(folder)
    try:
        net = teachers.rebuild_network(meta["net"])
    except (ImportError, AttributeError) as e:
        raise InputError(f"{folder / 'model.json'}: cannot rebuild the network ({e}); is the factory's folder "
                         "on PYTHONPATH?") from None
    try:
        model = NetDenoiser(net, meta["parameterization"], Schedule(meta["schedule"]))
        if "adapter" in meta:
            load_base_teacher(model, folder, meta)
        if meta["stage"] > 0:  # a student; stage 0 is the teacher's own network
            if meta.get("method") not in METHODS:
                raise ValueError(f"method {meta.get('method')!r} is not one of {', '.join(METHODS)}")
            model = METHODS[meta["method"]].rebuild(model, meta)
        if "adapter" in meta:
            adapters.Adapter.from_payload(state, meta["adapter"], str(folder / checkpoint.WEIGHTS_FILE)).apply(
                adapters.core_network(model), override_key="(a run's own stage cannot override)")
        else:
            model.load_state_dict(state)
    except (KeyError, TypeError, ValueError, RuntimeError) as e:
        if isinstance(e, (InputError, adapters.AdapterError)):
            raise
        first = str(e).strip().splitlines()[0] if str(e).strip() else type(e).__name__
        raise InputError(f"{folder / 'model.json'}: does not describe the saved weights ({first})") from None
    return model.requires_grad_(False).eval(), meta


def load_base_teacher(model, folder: Path, meta: dict) -> None:
    """The base teacher's weights into `model` (a NetDenoiser) for an adapter student saved in `folder`."""
    from . import checkpoint

    base = meta.get("base") or {}
    if "folder" in base:
        teacher_dir = folder.parent / base["folder"]
        state, _ = checkpoint.load_model_files(teacher_dir, f"the adapter in {folder} needs its run's teacher")
        model.load_state_dict(state)
    elif "weights" in base:
        state = checkpoint.read_tensors(base["weights"], f"the adapter in {folder} needs its imported teacher's "
                                        "weights there")
        model.net.load_state_dict(state)
    else:
        raise InputError(f"{folder / 'model.json'}: an adapter student without a 'base' entry (where its teacher is)")


# --------------------------------------------------------------------------------------------------- draw
def draw_samples(model, meta: dict, cfg, count: int, seed: int, data_fn, label: int | None = None,
                 w: float | None = None):
    """The stage's sampler on the noise bank of eval.seed=seed, eval.samples=count. `label` fixes every sample's
    class; `w` is the guidance weight of a guided student (default: method.judge_w, else the largest w of the grid)."""
    from .methods import method_named

    method_cfg = cfg.method
    if w is not None:  # a guided student at the asked weight (checked against its trained range before)
        from omegaconf import OmegaConf
        method_cfg = OmegaConf.merge(cfg.method, {"judge_w": float(w)})
    return _draw_on_bank(method_named(meta["method"]).sampler(method_cfg, model, meta["steps"], seed),
                         meta, cfg, count, seed, data_fn, label)


def draw_teacher(teacher, meta: dict, cfg, count: int, seed: int, data_fn):
    """The teacher at full steps (its own sampler) on the noise bank of eval.seed=seed, eval.samples=count."""
    from . import pipeline

    return _draw_on_bank(pipeline.teacher_sampler(teacher.denoiser, int(cfg.teacher.steps), cfg.teacher.sampler),
                         meta, cfg, count, seed, data_fn)


def _scored_count(run_dir: Path, cfg) -> int:
    """The size of the noise bank the stages were scored on (eval.detect may have sized it)."""
    import json

    try:
        return int(json.loads((run_dir / "reference.json").read_text()).get("samples") or cfg.eval.samples)
    except (OSError, ValueError):
        return cfg.eval.samples


def check_label_and_w(meta: dict, label: int | None, w: float | None) -> None:
    """--label needs a class-conditional student and one of its classes; --w a guided student and a weight inside
    the range it was trained on."""
    if w is not None and meta["method"] != "guided":
        raise InputError(f"--w {w:g}: only a guided student (method=guided) takes a guidance weight; this one is "
                         f"{meta['method']}")
    if label is not None and not meta["net"]["num_classes"]:
        raise InputError(f"--label {label}: this student is unconditional (no labels)")
    if label is not None or w is not None:
        from .methods.guided import check_request
        try:
            check_request(meta, label, w)
        except ValueError as e:
            raise InputError(str(e)) from None


def draw_target(args, run_dir: Path, index: int, seed: int, count: int) -> Path:
    extra = (f"_label-{args.label}" if args.label is not None else "") + (f"_w-{args.w:g}" if args.w is not None else "")
    name = f"stage-{index:02d}_seed-{seed}_n-{count}{extra}.npy"
    out = args.out if args.out is not None else run_dir / "drawn" / name
    if out.is_dir():
        return out / name
    if out.suffix != ".npy":
        raise InputError(f"--out {out}: give a file name ending in .npy, or an existing folder")
    return out


def teacher_model(run_dir: Path, cfg, data_fn):
    """(the run's teacher at its full steps as a sampler-ready SimpleNamespace, meta): loaded from RUN_DIR/teacher,
    never trained here (the oracle and an imported teacher are rebuilt from the config)."""
    from . import teachers

    if cfg.teacher.source == "train" and not (run_dir / "teacher" / "model.json").exists():
        raise InputError(f"--stage 0: RUN_DIR {run_dir} has no finished teacher (teacher/model.json)")
    teacher = teachers.prepare_teacher(cfg, data_fn(), run_dir)
    shape = list(data_fn().shape)
    meta = {"method": "teacher", "stage": 0, "steps": int(cfg.teacher.steps),
            "net": {"data_shape": shape, "num_classes": teacher.num_classes}}
    return teacher, meta


def _draw_on_bank(sampler, meta: dict, cfg, count: int, seed: int, data_fn, label: int | None = None):
    """sampler(noise, cond) on the noise bank of eval.seed=seed, eval.samples=count (evaluate.make_bench's draw
    order: noise first, then class labels picked from the data's labels)."""
    import torch

    from . import evaluate
    from .threads import apply_setting

    g = torch.Generator().manual_seed(seed)
    noise = torch.randn((count, *meta["net"]["data_shape"]), generator=g)
    cond = None
    if meta["net"]["num_classes"]:
        labels = data_fn().labels
        cond = labels[torch.randint(0, len(labels), (count,), generator=g)]
        if label is not None:
            cond = torch.full_like(cond, label)
    apply_setting(cfg.compute.threads, probe=False)  # auto: the cores this process may use
    return evaluate.draw(sampler, SimpleNamespace(noise=noise, cond=cond))


def cmd_draw(args) -> int:
    import numpy as np
    import torch

    from . import checkpoint, pipeline, report

    cfg, summary = open_run(args.run_dir)
    count = args.count if args.count is not None else _scored_count(args.run_dir, cfg)
    seed = args.seed if args.seed is not None else cfg.eval.seed
    if count < 1:
        raise InputError(f"--count {count}: must be >= 1")
    data = {}
    data_fn = lambda: data.setdefault("d", pipeline.load_data(cfg))  # noqa: E731  (loaded only when needed)
    teacher = None
    if args.stage == 0:
        teacher, meta = teacher_model(args.run_dir, cfg, data_fn)
    else:
        folder = pick_stage(args.run_dir, summary, args.stage)
        model, meta = rebuild_student(folder)
        check_label_and_w(meta, args.label, args.w)
        if args.beside_teacher:
            teacher, _ = teacher_model(args.run_dir, cfg, data_fn)
    out = draw_target(args, args.run_dir, meta["stage"], seed, count)
    if meta["stage"] == 0:
        x = draw_teacher(teacher, meta, cfg, count, seed, data_fn)
    else:
        x = draw_samples(model, meta, cfg, count, seed, data_fn, args.label, args.w)
    beside = draw_teacher(teacher, meta, cfg, count, seed, data_fn) if meta["stage"] and teacher is not None else None
    backdrop = torch.empty(0, *x.shape[1:])  # the data behind a 2D scatter, when it can still be loaded
    if x.dim() == 2:
        try:
            backdrop = data_fn().reference(report.SCATTER_POINTS, cfg.eval.seed + 1)
        except pipeline.DataError:
            pass
    buf = io.BytesIO()
    np.save(buf, x.numpy())
    checkpoint.atomic_write_bytes(out, buf.getvalue())
    picture = out.with_suffix(".png")
    steps = report.n_steps(meta["steps"])
    who = "teacher" if meta["stage"] == 0 else f"{meta['method']} stage {meta['stage']}"
    report.sample_picture(x, SimpleNamespace(reference=backdrop), picture, f"{who}: {steps}, seed {seed}",
                          teacher=beside, teacher_title=f"teacher: {report.n_steps(int(cfg.teacher.steps))}, same noise")
    print(f"drew {count} samples from {who} ({steps}) of {args.run_dir}" if meta["stage"] == 0 else
          f"drew {count} samples from stage {meta['stage']} ({meta['method']}, {steps}) of {args.run_dir}")
    print(f"  samples: {out}  shape {tuple(x.shape)}\n  picture: {picture}" +
          ("  (the teacher at full steps beside it, same noise)" if beside is not None else ""))
    return 0


# ------------------------------------------------------------------------------------------------ compare
def run_labels(run_dirs: list[Path]) -> list[str]:
    """Folder names, with the parent's name where two runs share one (sweep jobs 0, 1, ...)."""
    names = [d.resolve().name for d in run_dirs]
    return [f"{d.resolve().parent.name}/{n}" if names.count(n) > 1 else n for d, n in zip(run_dirs, names)]


def available_metrics(summary: dict) -> list[str]:
    return [k for k in summary["reference"]["teacher"] if not k.endswith("_se")]


def cmd_compare(args) -> int:
    from . import report

    summaries = []
    for d in args.run_dirs:
        _, s = open_run(d)
        if s is None:
            raise InputError(f"RUN_DIR {d}: no summary.json (unfinished run; rerun its command to resume it)")
        summaries.append(s)
    runs = list(zip(run_labels(args.run_dirs), summaries))
    metric = args.metric or summaries[0]["stop_metric"]
    for (label, s), d in zip(runs, args.run_dirs):
        if metric not in available_metrics(s):
            raise InputError(f"--metric {metric}: not measured in {d}; valid: {', '.join(available_metrics(s))}")
    out = args.out or (args.run_dirs[0] if len(runs) == 1 else Path("comparison"))
    if out.exists() and not out.is_dir():
        raise InputError(f"--out {out}: exists and is not a folder")
    print(report.comparison_table(runs, metric))
    out.mkdir(parents=True, exist_ok=True)
    paths = [out / "compare_quality.png", out / "compare_divergence.png", out / "compare_samples.png"]
    legends = [(label if s["method"] in label else f"{label} · {s['method']}", s) for label, s in runs]
    report.quality_vs_steps(legends, metric, paths[0])
    report.divergence_vs_steps(legends, paths[1])
    report.samples_side_by_side([(label, d) for (label, _), d in zip(runs, args.run_dirs)], summaries, paths[2])
    from .methods.guided import per_w_curves
    if per_w_curves(runs, metric, out / "compare_guided_per_w.png"):  # guided runs: metric vs NFE at each w
        paths.append(out / "compare_guided_per_w.png")
    print("plots: " + ", ".join(str(p) for p in paths))
    return 0


# -------------------------------------------------------------------------------------------------- merge
def cmd_merge(args) -> int:
    """Write an adapter student as a full network: teacher + weight changes folded into plain weights, in the
    same folder format (weights.safetensors + model.json) as a full student's stage."""
    from . import adapters, checkpoint

    _, summary = open_run(args.run_dir)
    folder = pick_stage(args.run_dir, summary, args.stage)
    _, meta = checkpoint.load_model_files(folder)
    if "adapter" not in meta:
        raise InputError(f"{folder}: holds a full student already (its {checkpoint.WEIGHTS_FILE} is the whole "
                         "network); merge is for adapter students")
    out = args.out if args.out is not None else args.run_dir / "merged" / folder.name
    if out.exists() and not out.is_dir():
        raise InputError(f"--out {out}: exists and is not a folder")
    model, meta = rebuild_student(folder)
    merged = adapters.merged_copy(model)
    full = {k: v for k, v in meta.items() if k not in ("adapter", "base", "format", "sha256")}
    full["merged_from"] = {"folder": str(folder.resolve()), "adapter_sha256": meta["sha256"],
                           "base_sha256": meta["adapter"]["base_sha256"]}
    written = checkpoint.save_model(out, merged.state_dict(), full)
    size = (out / checkpoint.WEIGHTS_FILE).stat().st_size
    print(f"merged stage {meta['stage']} ({meta['method']}, {meta['steps']} steps) of {args.run_dir}: "
          f"{out / checkpoint.WEIGHTS_FILE} ({size} bytes, sha256 {written['sha256'][:12]}) + {checkpoint.MODEL_FILE}")
    return 0


# ------------------------------------------------------------------------------------------------ parsing
DESCRIPTIONS = {
    "recipes": "List the ready-made recipes: purpose, expected CPU time and the command that runs each.",
    "draw": "Sample from a finished run's chosen student (or any finished stage; 0 is the teacher at its full "
            "steps): an .npy array and a picture. "
            "With the default --seed and --count it repeats the samples the stage was scored on.",
    "compare": "One table with every stage of one or more runs, and plots: quality versus steps (students and the "
               "teacher's DDIM baseline), divergence per stage, and the stages' samples side by side.",
    "merge": "Write an adapter student (adapter=lowrank) as one full network: the teacher with the adapter's weight "
             "changes folded in, as weights.safetensors + model.json, for users who want a single file.",
}


def _parser(verb: str) -> argparse.ArgumentParser:
    p = _Parser(prog=f"distillrun {verb}", description=DESCRIPTIONS[verb])
    if verb == "recipes":
        p.add_argument("name", nargs="?", metavar="NAME", help="print this recipe's YAML instead of the list")
    elif verb == "draw":
        p.add_argument("run_dir", type=Path, metavar="RUN_DIR", help="a finished run folder")
        p.add_argument("--stage", type=int, metavar="N", help="stage index (default: the chosen student); 0: the "
                       "teacher at its full steps")
        p.add_argument("--beside-teacher", action="store_true", help="draw the teacher at its full steps from the "
                       "same noise in a panel beside the stage's samples")
        p.add_argument("--count", type=int, metavar="N", help="how many samples (default: the run's eval.samples)")
        p.add_argument("--seed", type=int, metavar="S", help="noise seed (default: the run's eval.seed; with the "
                       "default count this repeats the samples the stage was scored on)")
        p.add_argument("--out", type=Path, metavar="PATH", help="a .npy file or an existing folder (default: "
                       "RUN_DIR/drawn/stage-NN_seed-S_n-N.npy); the picture goes beside it as .png")
        p.add_argument("--label", type=int, metavar="C", help="class-conditional students: every sample of class C "
                       "(default: classes drawn like the evaluation's)")
        p.add_argument("--w", type=float, metavar="W", help="guided students: the guidance weight, x_w = (1 + w) "
                       "x(z, c) - w x(z, null), w = 0 the conditional model (scale convention: s = 1 + w); inside the "
                       "range the student was trained on (default: method.judge_w, else the largest w of method.w_grid)")
    elif verb == "merge":
        p.add_argument("run_dir", type=Path, metavar="RUN_DIR", help="a finished run folder with adapter students")
        p.add_argument("--stage", type=int, metavar="N", help="stage index (default: the chosen student)")
        p.add_argument("--out", type=Path, metavar="DIR", help="folder for weights.safetensors + model.json "
                       "(default: RUN_DIR/merged/stage-NN)")
    else:
        p.add_argument("run_dirs", type=Path, nargs="+", metavar="RUN_DIR", help="one or more finished run folders")
        p.add_argument("--metric", metavar="M", help="quality metric (default: the first run's stop.metric)")
        p.add_argument("--out", type=Path, metavar="DIR", help="folder for the plots (default: the run folder for "
                       "one run, ./comparison for several)")
    return p


COMMANDS = {"recipes": cmd_recipes, "draw": cmd_draw, "compare": cmd_compare, "merge": cmd_merge}


def main(verb: str, argv: list[str]) -> int:
    from .adapters import AdapterError
    from .checkpoint import CheckpointError
    from .pipeline import DataError

    try:
        return COMMANDS[verb](_parser(verb).parse_args(argv))
    except (InputError, CheckpointError, DataError, AdapterError) as e:
        print(f"distillrun {verb}: error: {e}", file=sys.stderr)
        return EXIT_BAD_INPUT
