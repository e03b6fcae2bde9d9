"""Entry points; the only place that parses argv.

  distillrun [overrides...]          run a recipe (Hydra app: overrides, --multirun, launchers)
  distillrun recipes                 list recipes with purpose and expected CPU time
  distillrun draw RUN_DIR ...        sample from a finished run's chosen student (or any stage)
  distillrun compare RUN_DIR ...     stage table and plots for one run or several
Exit codes: 0 done, 2 bad config or input (one line, nothing written), 3 a stage failed.
"""
from __future__ import annotations

import sys

from .config import ConfigError, register_configs, validate

VERBS = ("recipes", "draw", "compare")
EXIT_BAD_INPUT, EXIT_STAGE_FAILED = 2, 3


def fail(message: str, code: int = EXIT_BAD_INPUT):
    print(f"distillrun: error: {message}", file=sys.stderr)
    sys.exit(code)


def user_errors() -> tuple[type[Exception], ...]:
    """Exceptions that describe a problem with the user's config, files or services (one line, exit 2)."""
    from .checkpoint import CheckpointError
    from .methods.teacher import TeacherError
    from .pipeline import DataError, RunFolderError
    from .tracking import TrackingError

    return ConfigError, CheckpointError, TeacherError, DataError, RunFolderError, TrackingError


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
    try:
        parsed = OverridesParser.create().parse_overrides(overrides)
    except Exception as e:
        fail(compose_error_line(e))
    base = [o.input_line if not o.is_sweep_override() else f"{o.get_key_element()}={next(o.sweep_string_iterator())}"
            for o in parsed]
    variants = [base]
    for i, o in enumerate(parsed):
        if o.is_sweep_override():
            variants += [base[:i] + [f"{o.get_key_element()}={v}"] + base[i + 1:] for v in o.sweep_string_iterator()]
    with initialize_config_module("distillrun.configs", version_base="1.3"):
        for ov in variants:
            try:
                validate(compose("run", overrides=ov))
            except ConfigError as e:
                fail(str(e))
            except Exception as e:
                fail(compose_error_line(e))


def run_job(cfg) -> int:
    """The Hydra task: validate, open tracking, run the pipeline, print the stage table."""
    from omegaconf import OmegaConf

    from . import pipeline, recorder, report, tracking

    try:
        validate(cfg)
        if cfg.run_dir is None:
            from hydra.core.hydra_config import HydraConfig
            OmegaConf.set_struct(cfg, False)
            cfg.run_dir = HydraConfig.get().runtime.output_dir
            OmegaConf.set_struct(cfg, True)
        if cfg.dry_run:
            print(pipeline.describe_plan(cfg, pipeline.plan_stages(cfg)))
            return 0
        data = pipeline.preflight(cfg)  # before anything is written, to the run folder or the store
        with recorder.recorder_for(cfg) as rec:
            summary = pipeline.run(cfg, rec, recipe_name(), data)
    except user_errors() as e:
        fail(str(e))
    print(report.stage_table(summary))
    print(f"run folder: {cfg.run_dir}")
    if cfg.tracking.enabled:
        print(f"MLflow: {tracking.ui_hint(cfg.tracking.uri)}")
    if summary["failed"]:
        print("a stage failed: lower method.lr or raise method.grad_clip, then rerun the same command to resume",
              file=sys.stderr)
        sys.exit(EXIT_STAGE_FAILED)
    return 0


def recipe_name() -> str | None:
    from hydra.core.hydra_config import HydraConfig

    return HydraConfig.get().runtime.choices.get("recipe") if HydraConfig.initialized() else None


def hydra_main() -> None:
    import hydra

    precheck(sys.argv[1:])
    hydra.main(config_path="configs", config_name="run", version_base="1.3")(run_job)()


def main() -> None:
    register_configs()
    if len(sys.argv) > 1 and sys.argv[1] in VERBS:
        from . import verbs

        sys.exit(verbs.main(sys.argv[1], sys.argv[2:]))
    hydra_main()


if __name__ == "__main__":
    main()
