"""Make a baseline copy of the package for side-by-side benchmarks: the working tree's distillrun/ with the files
the performance work touches put back as they are at a git revision, so a comparison isolates those files from
other work in progress. Read-only for the repository (`git show`). Since the method modules took over what
stages.py held, the methods and the training loop can no longer be mixed into the current tree: those files, and
every module that names them, come from the revision together (BEFORE_SEAM_FILES).

Usage: python benchmarks/baseline_tree.py DEST [--rev REV]  (default: ef586dc, the last commit before the
       performance changes); then e.g.
       python benchmarks/recipes.py --src DEST --out /tmp/recipes-baseline
"""
import argparse
import shutil
import subprocess
from pathlib import Path

BEFORE = "ef586dc"  # the last commit before the performance changes
PERF_FILES = ["distillrun/evaluate.py", "distillrun/samplers.py", "distillrun/metrics.py",
              "distillrun/methods/progressive.py", "distillrun/methods/consistency.py",
              "distillrun/methods/teacher.py", "distillrun/stages.py", "distillrun/training.py",
              "distillrun/nets/mlp.py", "distillrun/nets/unet.py", "distillrun/denoiser.py"]
# Modules that name the method registry, the loop's settings or the dataset registry as they were before the
# method seam: taken from the revision with PERF_FILES, so the copy imports as one consistent package.
BEFORE_SEAM_FILES = ["distillrun/methods/__init__.py", "distillrun/nets/__init__.py", "distillrun/pipeline.py",
                     "distillrun/teachers.py", "distillrun/verbs.py", "distillrun/config.py",
                     "distillrun/data/__init__.py", "distillrun/report.py", "distillrun/stopping.py",
                     "distillrun/features.py", "distillrun/checkpoint.py", "distillrun/runfolder.py",
                     "distillrun/cli.py"]


def make(dest: Path, rev: str = BEFORE) -> Path:
    root = Path(__file__).resolve().parent.parent
    if (dest / "distillrun").exists():
        shutil.rmtree(dest / "distillrun")
    shutil.copytree(root / "distillrun", dest / "distillrun", ignore=shutil.ignore_patterns("__pycache__"))
    for f in PERF_FILES + BEFORE_SEAM_FILES:
        text = subprocess.run(["git", "show", f"{rev}:{f}"], cwd=root, check=True, capture_output=True).stdout
        (dest / f).write_bytes(text)
    return dest


if __name__ == "__main__":
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("dest", type=Path)
    p.add_argument("--rev", default=BEFORE)
    a = p.parse_args()
    print(make(a.dest, a.rev))
