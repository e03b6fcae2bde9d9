"""Entry points; the only place that parses argv.

  distillrun [overrides...]          run a recipe (Hydra app: overrides, --multirun, launchers)
  distillrun recipes                 list recipes with purpose and expected CPU time
  distillrun draw RUN_DIR ...        sample from a finished run's chosen student (or any stage)
  distillrun compare RUN_DIR ...     stage table and plots for one run or several
  distillrun merge RUN_DIR ...       an adapter student written as one full network (teacher + adapter folded in)
Exit codes: 0 done, 2 bad config or input (one line, nothing written), 3 a stage or the teacher's training
failed (one line saying what to change; earlier stages stay in the run folder).
"""
from __future__ import annotations

import sys

from .config import ConfigError, register_configs, validate

VERBS = ("recipes", "draw", "compare", "merge")
EXIT_BAD_INPUT, EXIT_STAGE_FAILED = 2, 3


def fail(message: str, code: int = EXIT_BAD_INPUT):
    print(f"distillrun: error: {message}", file=sys.stderr)
    sys.exit(code)


def user_errors() -> tuple[type[Exception], ...]:
    """Exceptions that describe a problem with the user's config, files or services (one line, exit 2)."""
    from .adapters import AdapterError
    from .checkpoint import CheckpointError
    from .teachers import TeacherError
    from .pipeline import DataError, RunFolderError
    from .tracking import TrackingError

    return ConfigError, CheckpointError, TeacherError, DataError, RunFolderError, TrackingError, AdapterError


def compose_error_line(e: Exception) -> str:
    """One line from a Hydra/OmegaConf composition error: the cause's first line plus its full key."""
    cause = e.__cause__ or e
    text = str(cause).strip().splitlines()
    line = text[0] if text else type(cause).__name__
    key = next((t.split("full_key:", 1)[1].strip() for t in text if "full_key:" in t), None)
    if key and key not in line:
        line = f"{key}: {line}"
    return line.replace("To append to your config use", "(to add a new key use")


def precheck(argv: list[str]) -> None:
    """Compose and validate the config(s) an invocation would run, before Hydra starts any job.
    Sweep overrides (a=1,2) are checked value by value."""
    from hydra import compose, initialize_config_module
    from hydra.core.override_parser.overrides_parser import OverridesParser

    flags = [a for a in argv if a.startswith("-")]
    if any(f not in ("-m", "--multirun") for f in flags):
        return  # --help, --cfg, --info ...: Hydra's own business
    overrides = [a for a in argv if not a.startswith("-") and not a.lstrip("+~").startswith("hydra")]
    parser = OverridesParser.create()
    try:
        parsed = parser.parse_overrides(overrides)
    except Exception as e:
        for o in overrides:  # name the override that does not parse
            try:
                parser.parse_overrides([o])
            except Exception:
                fail(f"{o}: {compose_error_line(e)}")
        fail(compose_error_line(e))
    sweeps = [o.input_line for o in parsed if o.is_sweep_override()]
    if sweeps and not flags:
        fail(f"{sweeps[0]}: a sweep needs --multirun (-m); for a list write key=[a,b], for text quote it: key='a,b'")
    base = [o.input_line if not o.is_sweep_override() else f"{o.get_key_element()}={next(o.sweep_string_iterator())}"
            for o in parsed]
    variants = [base]
    for i, o in enumerate(parsed):
        if o.is_sweep_override():
            variants += [base[:i] + [f"{o.get_key_element()}={v}"] + base[i + 1:] for v in o.sweep_string_iterator()]
    with initialize_config_module("distillrun.configs", version_base="1.3"):
        for ov in variants:
            try:
                cfg = compose("run", overrides=ov)
                validate(cfg)
            except ConfigError as e:
                fail(str(e))
            except Exception as e:
                fail(compose_error_line(e))
            for o in parsed:
                if (o.is_add() or o.is_force_add()) and unknown_addition(cfg, o.key_or_group):
                    fail(f"{o.input_line}: '{o.key_or_group}' is not a distillrun key (a + adds a key that nothing "
                         "reads); drop the + to set an existing key, see distillrun --cfg job")


def unknown_addition(cfg, key: str) -> bool:
    """True when `+key=...` added a key under a typed config node (one distillrun never reads); keys added to a
    free-form mapping such as teacher.factory_kwargs are the user's own, and config groups are Hydra's."""
    import dataclasses
    from importlib.resources import files

    from omegaconf import OmegaConf

    if "." not in key and (key == "recipe" or files("distillrun.configs").joinpath(key).is_dir()):
        return False  # +group=option: a config group
    head, _, name = key.rpartition(".")
    parent = OmegaConf.select(cfg, head) if head else cfg
    schema = OmegaConf.get_type(parent) if OmegaConf.is_config(parent) else None
    if schema is None or not dataclasses.is_dataclass(schema):
        return not OmegaConf.is_config(parent)  # under a free-form mapping: the user's own key
    return name not in {f.name for f in dataclasses.fields(schema)}


def run_job(cfg) -> int:
    """The Hydra task: validate, open tracking, run the pipeline, print the stage table."""
    from omegaconf import OmegaConf

    from . import distributed, pipeline, recorder, report, tracking
    from .teachers import TeacherTrainingFailed

    try:
        validate(cfg)
        share_cores_with_sweep()
        join_ranks(cfg)
        if cfg.run_dir is None:
            from hydra.core.hydra_config import HydraConfig
            OmegaConf.set_struct(cfg, False)
            cfg.run_dir = HydraConfig.get().runtime.output_dir
            OmegaConf.set_struct(cfg, True)
        data = pipeline.preflight(cfg)  # before anything is written, to the run folder or the store
        if cfg.dry_run:
            print(pipeline.describe_plan(cfg, pipeline.plan_stages(cfg)))
            return 0
        with recorder.recorder_for(cfg) as rec:
            summary = pipeline.run(cfg, rec, recipe_name(), data)
    except user_errors() as e:
        fail(str(e))
    except TeacherTrainingFailed as e:
        fail(str(e), EXIT_STAGE_FAILED)
    except (MemoryError, RuntimeError) as e:
        if not pipeline.is_out_of_memory(e):
            raise
        fail(f"out of memory ({' '.join(str(e).split())[:120]}); lower eval.samples, teacher.batch_size, "
             "method.batch_size or the network sizes (net.*), then rerun with fresh=true or another run_dir")
    finally:
        distributed.teardown()
    if summary is None:  # a rank other than 0 under torchrun: rank 0 reports
        return 0
    print(report.stage_table(summary))
    if summary["method"] == "guided":
        from .methods.guided import per_w_table
        print(per_w_table(summary))
    print(f"run folder: {cfg.run_dir}")
    if cfg.tracking.enabled:
        print(f"MLflow: {tracking.ui_hint(cfg.tracking.uri)}")
    if summary["failed"]:
        fail(failed_stage_line(cfg, summary), EXIT_STAGE_FAILED)
    return 0


def join_ranks(cfg) -> None:
    """Under torchrun: check what every rank must share, join the process group, and leave MLflow, the
    run folder and the progress bars to rank 0."""
    from omegaconf import OmegaConf

    from . import distributed
    from .teachers import resolve_device

    distributed.adopt_cluster_env()
    world = distributed.world_size()
    if world <= 1:
        return
    if cfg.run_dir is None:
        raise ConfigError("run_dir", None, f"set run_dir=... when launching {world} ranks with torchrun, "
                          "so that all of them share one run folder")
    for key in ("teacher.batch_size", "method.batch_size"):
        size = OmegaConf.select(cfg, key)
        if size % world:
            raise ConfigError(key, size, f"must be divisible by the {world} ranks (each takes an equal share)")
    distributed.setup(resolve_device(cfg.compute.device))
    if not distributed.is_main():
        OmegaConf.set_struct(cfg, False)
        cfg.tracking.enabled, cfg.quiet = False, True
        OmegaConf.set_struct(cfg, True)


def share_cores_with_sweep() -> None:
    """Under the parallel sweep launcher (joblib), compute.threads=auto splits the cores among the jobs that
    run at once (its n_jobs); torchrun's ranks are counted from LOCAL_WORLD_SIZE in threads.core_limit."""
    from hydra.core.hydra_config import HydraConfig
    from hydra.types import RunMode
    from omegaconf import OmegaConf

    from . import threads

    if not HydraConfig.initialized():
        return
    hc = HydraConfig.get()
    if hc.mode != RunMode.MULTIRUN:
        return
    launcher = OmegaConf.to_container(hc.launcher, resolve=True) if hc.get("launcher") is not None else None
    threads.set_sweep_jobs(threads.joblib_jobs(launcher))


def failed_stage_line(cfg, summary: dict) -> str:
    """What failed, what to change, and what is kept (one line). lr and grad_clip are keys of MethodConfig,
    which every method's config extends."""
    last = summary["stages"][-1]
    m = cfg.method
    kept = f"the stages before it are kept (chosen: {summary['chosen']['folder']})" if summary["chosen"] else \
        "the teacher is kept"
    return (f"stage {last['index']} ({last['steps']} steps) failed: {last['rule']}; lower method.lr (now {m.lr:g}) "
            f"or method.grad_clip (now {m.grad_clip:g}) and rerun with fresh=true or another run_dir; "
            f"{kept} in {cfg.run_dir}")


def recipe_name() -> str | None:
    from hydra.core.hydra_config import HydraConfig

    return HydraConfig.get().runtime.choices.get("recipe") if HydraConfig.initialized() else None


def hydra_main() -> None:
    import hydra

    precheck(sys.argv[1:])
    hydra.main(config_path="pkg://distillrun.configs", config_name="run", version_base="1.3")(run_job)()


def main() -> None:
    register_configs()
    if len(sys.argv) > 1 and sys.argv[1] in VERBS:
        from . import verbs

        sys.exit(verbs.main(sys.argv[1], sys.argv[2:]))
    hydra_main()


if __name__ == "__main__":
    main()
