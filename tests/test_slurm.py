"""Scale-out through a real SLURM cluster (slow tier): the project's own launcher template
(configs/hydra/launcher/slurm.yaml, Hydra's submitit launcher) submits to a private single-node cluster brought
up for the session (tests/slurm_cluster.py), with only the node's sizes overridden on the command line.

Outside references: SLURM itself (sbatch/srun run the tasks, scancel cancels, sacct reports job states and exit
codes: slurm.conf(5), sacct(1)); Hydra's submitit launcher and submitit's job environment; torch.distributed
(gloo); MLflow's own MlflowClient reads the store back. The data-parallel invariant is the one DDP promises
(PyTorch DDP notes: W ranks with 1/W of the global batch each take the step one process takes on all of it),
checked as tests/test_distributed.py checks it for torchrun.

Run: python -m pytest -q -m slow tests/test_slurm.py -s   (as root; installs Debian's packages if missing,
prints how long the bring-up, each job and the teardown took).
"""
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import pytest
import torch
from safetensors.torch import load_file

from slurm_cluster import ClusterUnavailable, SlurmCluster, ensure_installed

pytestmark = pytest.mark.slow

TINY = ["teacher.iterations=60", "teacher.steps=4", "method.iterations=20", "eval.samples=256", "eval.bootstrap=5",
        "eval.projections=16", "compute.threads=1", "quiet=true", "data.n_train=4096", "net.width=32",
        "net.depth=2"]
# Resume points every 20 of 200 iterations: a stage lasts long enough to be cancelled in the middle.
LONGER = [a for a in TINY if not a.startswith("method.iterations")] + ["method.iterations=200",
                                                                       "checkpoint_every=20", "stop.tolerance=1000"]
PARTS = ("teacher", "stage-01", "stage-02")
TIMINGS: dict[str, float] = {}


def node_sizes(tasks: int) -> list[str]:
    """The template is written for GPU nodes; this node has 2 CPUs, no GPUs and a few GB to spare."""
    return ["hydra.launcher.gpus_per_node=null", f"hydra.launcher.tasks_per_node={tasks}",
            "hydra.launcher.cpus_per_task=1", "hydra.launcher.mem_gb=1"]


@pytest.fixture(scope="session")
def slurm():
    try:
        ensure_installed()
    except ClusterUnavailable as e:
        pytest.skip(str(e))
    # munged wants every folder above its socket searchable by all: not pytest's 0700 temp root.
    root = Path(tempfile.mkdtemp(prefix="distillrun-slurm-"))
    os.chmod(root, 0o755)
    cluster = SlurmCluster(root)
    ok = False
    try:
        cluster.start()
        yield cluster
        ok = True
    finally:
        cluster.stop()
        TIMINGS.update(cluster.timings)
        print("\nSLURM timings (s): " + ", ".join(f"{k} {v:.1f}" for k, v in TIMINGS.items()), file=sys.stderr)
        if ok:
            shutil.rmtree(root, ignore_errors=True)
        else:
            print(f"cluster logs kept in {root / 'log'}", file=sys.stderr)


def job_env(cluster: SlurmCluster) -> dict:
    env = {**cluster.env, "OMP_NUM_THREADS": "1", "MLFLOW_DISABLE_TELEMETRY": "true", "PYTHONWARNINGS": "ignore"}
    env["PATH"] = f"{Path(sys.executable).parent}{os.pathsep}{env.get('PATH', '')}"
    return env


def submit(cluster, args, cwd, tasks=1) -> subprocess.Popen:
    """`distillrun -m hydra/launcher=slurm ...`: the sweep process submits and waits for its jobs."""
    argv = [sys.executable, "-m", "distillrun.cli", "-m", "hydra/launcher=slurm", *node_sizes(tasks), *args]
    return subprocess.Popen(argv, cwd=cwd, env=job_env(cluster), stdout=subprocess.PIPE, stderr=subprocess.STDOUT,
                            text=True)


def sweep(cluster, args, cwd, tasks=1, label=None) -> subprocess.CompletedProcess:
    t0 = time.monotonic()
    p = submit(cluster, args, cwd, tasks)
    out, _ = p.communicate(timeout=900)
    if label:
        TIMINGS[label] = time.monotonic() - t0
    return subprocess.CompletedProcess(p.args, p.returncode, out, "")


def accounting(cluster, sweep_dir: Path) -> dict[str, tuple[str, str]]:
    """{job id: (state, exit code)} from sacct for the jobs of one sweep (their ids name its .submitit folders)."""
    ids = sorted(d.name for d in (sweep_dir / ".submitit").iterdir() if d.is_dir() and d.name[0].isdigit())
    out = cluster.run("sacct", "-n", "-X", "-P", "-o", "JobID,State,ExitCode", "-j",
                      ",".join(i.split("_")[0] for i in ids)).stdout
    rows = [line.split("|") for line in out.splitlines() if line]
    return {r[0]: (r[1], r[2]) for r in rows if r[0] in ids}


def settled(cluster, sweep_dir: Path, n: int, deadline_s: float = 120) -> dict:
    """Job states once all n jobs of the sweep have ended (sacct can lag the end by a moment)."""
    end = time.monotonic() + deadline_s
    while True:
        states = accounting(cluster, sweep_dir)
        if len(states) == n and all(s not in ("PENDING", "RUNNING", "COMPLETING") for s, _ in states.values()):
            return states
        assert time.monotonic() < end, states
        time.sleep(1)


def only_sweep(cwd: Path, after: set = frozenset()) -> Path:
    dirs = [d for d in (cwd / "runs").glob("sweep-*") if d not in after]
    assert len(dirs) == 1, dirs
    return dirs[0]


def assert_same_student(a_dir: Path, b_dir: Path):
    for part in PARTS:
        a = load_file(a_dir / part / "weights.safetensors")
        b = load_file(b_dir / part / "weights.safetensors")
        assert a.keys() == b.keys()
        for k in a:  # float tolerance: the two ranks sum their halves of the batch in another order
            torch.testing.assert_close(a[k], b[k], rtol=1e-5, atol=1e-6)


def one_process(args, run_dir: Path, cwd: Path):
    env = {**os.environ, "OMP_NUM_THREADS": "1", "MLFLOW_DISABLE_TELEMETRY": "true", "PYTHONWARNINGS": "ignore"}
    res = subprocess.run([sys.executable, "-m", "distillrun.cli", *args, "tracking=off", f"run_dir={run_dir}"],
                         cwd=cwd, env=env, capture_output=True, text=True, timeout=900)
    assert res.returncode == 0, res.stderr[-2000:]


def test_sweep_of_two_tolerances_runs_as_two_jobs_with_two_pipelines_in_mlflow(slurm, tmp_path):
    from mlflow import MlflowClient

    uri = f"sqlite:///{tmp_path / 'sweep.db'}"
    # One run folder per point, named by the swept value: the form the template and README show.
    res = sweep(slurm, [*TINY, "teacher.steps=2", f"tracking.uri={uri}", f"tracking.artifacts={tmp_path / 'art'}",
                        f"run_dir={tmp_path / 'shared'}/tol-${{stop.tolerance}}", "stop.tolerance=0.5,1000"],
                tmp_path, label="sweep_two_points_s")
    assert res.returncode == 0, res.stdout[-3000:]
    sweep_dir = only_sweep(tmp_path)
    states = settled(slurm, sweep_dir, 2)
    assert sorted(states.values()) == [("COMPLETED", "0:0")] * 2, states  # what SLURM itself recorded
    assert sorted(d.name for d in (tmp_path / "shared").iterdir()) == ["tol-0.5", "tol-1000.0"]
    for point in ("tol-0.5", "tol-1000.0"):  # each a finished pipeline
        assert (tmp_path / "shared" / point / "summary.json").is_file()
        assert (tmp_path / "shared" / point / "stage-01" / "metrics.json").is_file()
    client = MlflowClient(tracking_uri=uri)
    runs = client.search_runs([client.get_experiment_by_name("distillrun").experiment_id])
    parents = [r for r in runs if "mlflow.parentRunId" not in r.data.tags]
    assert sorted(p.data.params["stop.tolerance"] for p in parents) == ["0.5", "1000.0"]
    for p in parents:
        assert p.info.status == "FINISHED"
        children = [r for r in runs if r.data.tags.get("mlflow.parentRunId") == p.info.run_id]
        assert len(children) >= 1 and all("quality/sw2" in c.data.metrics for c in children)


@pytest.fixture(scope="module")
def reference(tmp_path_factory):
    """One process, the whole global batch, no cluster: the student the two-task jobs must reproduce."""
    root = tmp_path_factory.mktemp("one")
    one_process(LONGER, root / "one", root)
    return root / "one"


def test_two_tasks_join_as_ranks_and_train_the_same_student_as_one_process(slurm, tmp_path, reference):
    res = sweep(slurm, [*LONGER, "tracking=off", f"run_dir={tmp_path / 'two'}"], tmp_path, tasks=2,
                label="data_parallel_job_s")
    assert res.returncode == 0, res.stdout[-3000:]
    sweep_dir = only_sweep(tmp_path)
    assert list(settled(slurm, sweep_dir, 1).values()) == [("COMPLETED", "0:0")]
    assert_same_student(tmp_path / "two", reference)
    # Two tasks of one job, ranks 0 and 1 of a world of 2 (submitit's job environment); rank 0 alone reports.
    logs = sorted((sweep_dir / ".submitit").glob("*/*_log.out"))
    assert len(logs) == 2, logs
    texts = [f.read_text() for f in logs]
    assert any("global_rank=0(2)" in t for t in texts) and any("global_rank=1(2)" in t for t in texts)
    assert sum(t.count("stage steps") for t in texts) == 1


def test_data_parallel_job_cancelled_mid_stage_resumes_when_resubmitted(slurm, tmp_path, reference):
    run_dir = tmp_path / "two"
    args = [*LONGER, "tracking=off", f"run_dir={run_dir}"]
    t0 = time.monotonic()
    p = submit(slurm, args, tmp_path, tasks=2)
    partial = run_dir / "stage-01" / "partial.safetensors"
    try:
        while not partial.exists():  # the first resume point of stage 1 is on disk: the stage is under way
            assert p.poll() is None, p.stdout.read()[-3000:]
            assert time.monotonic() - t0 < 600, "stage 1 never started"
            time.sleep(0.01)
        job = slurm.jobs()
        assert len(job) == 1, job
        # Freeze the job's processes first (SLURM suspends with SIGSTOP), so that the stage cannot end in
        # the seconds a cancellation takes: submitit ignores SIGTERM and waits for the SIGKILL after KillWait.
        slurm.run("scontrol", "suspend", job[0])
        assert not (run_dir / "stage-01" / "metrics.json").exists()  # stopped in the middle of stage 1
        slurm.run("scancel", job[0])
        out, _ = p.communicate(timeout=300)  # submitit learns the end from sacct
    finally:
        if p.poll() is None:
            p.kill()
    TIMINGS["cancelled_job_s"] = time.monotonic() - t0
    assert p.returncode != 0 and "CANCELLED" in out, out[-3000:]
    first = only_sweep(tmp_path)
    assert [s.split()[0] for s, _ in settled(slurm, first, 1).values()] == ["CANCELLED"]  # "CANCELLED by 0"
    assert not (run_dir / "stage-01" / "metrics.json").exists()  # and it was not finished since
    teacher_written = (run_dir / "teacher" / "weights.safetensors").stat().st_mtime_ns
    res = sweep(slurm, args, tmp_path, tasks=2, label="resubmitted_job_s")
    assert res.returncode == 0, res.stdout[-3000:]
    second = only_sweep(tmp_path, after={first})
    assert list(settled(slurm, second, 1).values()) == [("COMPLETED", "0:0")]
    assert (run_dir / "teacher" / "weights.safetensors").stat().st_mtime_ns == teacher_written  # reused, not redone
    assert not partial.exists()
    assert_same_student(run_dir, reference)


def test_a_job_warned_of_its_time_limit_is_requeued_and_resumes(slurm, tmp_path, reference):
    # SLURM warns a job signal_delay_s before its time limit with SIGUSR2 to its steps (sbatch --signal, which
    # submitit sets); here the test sends that same signal with scancel once stage 1 is under way, so the
    # moment is exact. With a limit of at most 10 minutes submitit counts it as a timeout, requeues the job
    # (the template's max_num_timeout allows it) and the requeued job resumes from the run folder. SLURM
    # holds a requeued job for about two minutes before it may start again.
    run_dir = tmp_path / "two"
    t0 = time.monotonic()
    p = submit(slurm, [*LONGER, "tracking=off", f"run_dir={run_dir}", "hydra.launcher.timeout_min=10"], tmp_path,
               tasks=2)
    partial = run_dir / "stage-01" / "partial.safetensors"
    try:
        while not partial.exists():
            assert p.poll() is None, p.stdout.read()[-3000:]
            assert time.monotonic() - t0 < 600, "stage 1 never started"
            time.sleep(0.05)
        job = slurm.jobs()
        assert len(job) == 1, job
        slurm.run("scancel", "--signal=USR2", job[0])
        out, _ = p.communicate(timeout=900)
    finally:
        if p.poll() is None:
            p.kill()
    TIMINGS["time_limit_requeued_job_s"] = time.monotonic() - t0
    assert p.returncode == 0, out[-3000:]
    assert list(settled(slurm, only_sweep(tmp_path), 1).values()) == [("COMPLETED", "0:0")]
    history = slurm.run("sacct", "-n", "-X", "-P", "-D", "-o", "JobID,State", "-j", job[0]).stdout.split()
    assert history == [f"{job[0]}|REQUEUED", f"{job[0]}|COMPLETED"], history
    logs = "".join(f.read_text() for f in (only_sweep(tmp_path) / ".submitit").glob("*/*_log.*"))
    assert "this job is timed-out" in logs and "Requeued job" in logs
    assert_same_student(run_dir, reference)


def test_a_job_that_fails_inside_comes_back_failed_with_its_one_line_error(slurm, tmp_path):
    # net.kind=unet passes the submit-time check (a valid key and value) and fails inside the job, where
    # the data is loaded: 2-D points do not fit an image network.
    res = sweep(slurm, [*TINY, "tracking=off", "stop.tolerance=1000", "net.kind=mlp,unet"], tmp_path,
                label="sweep_with_failing_job_s")
    line = "distillrun: error: net.kind=unet does not fit data of shape (2,); use net=mlp"
    assert res.returncode != 0, res.stdout[-3000:]
    assert "state: FAILED" in res.stdout and line in res.stdout  # the sweep reports the failed job and why
    sweep_dir = only_sweep(tmp_path)
    states = settled(slurm, sweep_dir, 2)
    by_point = {k.split("_")[1]: v for k, v in states.items()}
    assert by_point == {"0": ("COMPLETED", "0:0"), "1": ("FAILED", "2:0")}, states  # exit code 2: bad input
    err = next((sweep_dir / ".submitit").glob("*_1/*_1_0_log.err")).read_text()
    assert [x for x in err.splitlines() if x.startswith("distillrun:")] == [line]  # one line, no traceback
    assert "Traceback" not in err
    assert (sweep_dir / "0" / "summary.json").is_file() and not (sweep_dir / "1" / "summary.json").exists()
