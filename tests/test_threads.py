"""compute.threads=auto: the chooser picks the count that trains fastest, within the cores this process may use,
and times the candidates again when throughput moves. A fake clock stands in for the machine: each iteration
advances it by the cost the test gives for the current thread count, so no assertion depends on wall time.

Outside references: the cgroup files follow the Linux kernel's documented formats (cgroup v2 `cpu.max` is
"$MAX $PERIOD" with "max" for no limit; v1 `cpu.cfs_quota_us` is -1 for no limit, from memory of the kernel's
cgroup documentation); joblib's n_jobs rule for negative values (-1 = all CPUs, -2 = all but one) is joblib's
documented behaviour."""
import pytest
import torch

from distillrun import threads
from distillrun.config import ConfigError, validate


class FakeMachine:
    """Seconds per iteration for each thread count; `cost` can change mid-run (a competitor arrives)."""

    def __init__(self, cost: dict):
        self.cost, self.now, self.threads, self.applied, self.iterations_at = dict(cost), 0.0, None, [], {}

    def clock(self) -> float:
        return self.now

    def apply(self, n: int) -> None:
        self.threads = n
        self.applied.append(n)

    def chooser(self, limit: int, **kw) -> threads.AutoThreads:
        return threads.AutoThreads(limit, "test", clock=self.clock, apply=self.apply, **kw)

    def run(self, gov, iterations: int) -> None:
        for _ in range(iterations):
            gov.begin()
            self.now += self.cost[self.threads]
            self.iterations_at[self.threads] = self.iterations_at.get(self.threads, 0) + 1
            gov.end()


def test_a_hopeless_candidate_costs_one_iteration():
    # one busy competitor on 2 cores: a 2-thread iteration can take 10x a 1-thread one; a full burst would cost more
    # than the choice saves, so the chooser gives up on it after one iteration and does not time it again
    m = FakeMachine({1: 0.030, 2: 0.300})
    gov = m.chooser(2, recheck_seconds=None)
    m.run(gov, 300)
    assert m.threads == 1 and m.iterations_at[2] == 1


@pytest.mark.parametrize("cost, best", [({1: 0.050, 2: 0.030}, 2),  # idle: 2 threads faster
                                        ({1: 0.030, 2: 0.110}, 1)])  # busy competitor: 1 thread faster
def test_picks_the_faster_candidate(cost, best):
    m = FakeMachine(cost)
    gov = m.chooser(2, recheck_seconds=None)
    m.run(gov, 200)
    assert [c.threads for c in gov.choices] == [best] and gov.choices[0].reason == "start"
    assert m.threads == best
    assert gov.choices[0].rates == pytest.approx({n: 1 / c for n, c in cost.items()})
    assert sorted(set(m.applied)) == [1, 2]  # both candidates were timed


def test_respects_the_core_limit():
    m = FakeMachine({n: 0.1 / n for n in range(1, 17)})  # more threads always faster
    gov = m.chooser(3, recheck_seconds=None)
    m.run(gov, 300)
    assert max(m.applied) == 3 and m.threads == 3


def test_single_core_never_probes():
    m = FakeMachine({1: 0.01})
    gov = m.chooser(1)
    m.run(gov, 100)
    assert m.applied == [1] and [c.reason for c in gov.choices] == ["single core"]


def test_rechecks_when_throughput_drops():
    m = FakeMachine({1: 0.050, 2: 0.030})
    gov = m.chooser(2, recheck_seconds=None)
    m.run(gov, 400)
    assert [c.threads for c in gov.choices] == [2]
    m.cost = {1: 0.055, 2: 0.150}  # a busy process arrives: 2 threads now wait on a descheduled sibling
    m.run(gov, 400)
    assert [(c.threads, c.reason) for c in gov.choices] == [(2, "start"), (1, "slower")]
    assert gov.choices[1].iteration > 400 and m.threads == 1


def test_steady_throughput_keeps_the_choice():
    m = FakeMachine({1: 0.050, 2: 0.030})
    gov = m.chooser(2, recheck_seconds=None)
    m.run(gov, 2000)
    assert len(gov.choices) == 1


def test_periodic_recheck_finds_a_freed_machine():
    # 1 thread is as fast as before when the competitor leaves, so only the periodic re-check can notice 2 is faster
    m = FakeMachine({1: 0.030, 2: 0.110})
    gov = m.chooser(2, recheck_seconds=30.0)
    m.run(gov, 200)
    assert m.threads == 1
    m.cost = {1: 0.030, 2: 0.018}
    m.run(gov, 2000)
    assert m.threads == 2 and gov.choices[-1].reason == "periodic"


def test_periodic_rechecks_back_off_while_nothing_changes():
    m = FakeMachine({1: 0.030, 2: 0.110})
    gov = m.chooser(2, recheck_seconds=10.0)
    m.run(gov, 6000)  # 180 s of loop time: re-checks after ~10, 20, 40, 80 s, not 18 of them
    periodic = [c for c in gov.choices if c.reason == "periodic"]
    assert 2 <= len(periodic) <= 5 and all(c.threads == 1 for c in gov.choices)


def test_probe_order_is_balanced():
    m = FakeMachine({1: 0.030, 2: 0.026, 3: 0.024})  # close: every candidate stays for the second pass
    m.run(m.chooser(3, recheck_seconds=None), 200)
    first = [n for i, n in enumerate(m.applied) if i == 0 or m.applied[i - 1] != n]
    assert first == [1, 2, 3, 2, 1, 3]  # 1..L, then L..1 (3 twice in a row), then the choice


@pytest.mark.parametrize("affinity, quota, local, expected", [
    (8, None, "1", 8), (8, 1.5, "1", 2), (8, 0.5, "1", 1), (8, None, "2", 4), (2, None, "4", 1), (2, 4.0, "1", 2)])
def test_core_limit(affinity, quota, local, expected):
    assert threads.core_limit({"LOCAL_WORLD_SIZE": local}, affinity, quota, read_quota=False) == expected


def test_parallel_sweep_splits_the_cores():
    target = "hydra_plugins.hydra_joblib_launcher.joblib_launcher.JoblibLauncher"
    assert threads.joblib_jobs({"_target_": target, "n_jobs": 2}) == 2
    assert threads.joblib_jobs({"_target_": target, "n_jobs": -1}, cpus=8) == 8  # joblib: all CPUs
    assert threads.joblib_jobs({"_target_": target, "n_jobs": -2}, cpus=8) == 7  # all but one
    assert threads.joblib_jobs({"_target_": "hydra._internal.core_plugins.basic_launcher.BasicLauncher"}) == 1
    try:
        threads.set_sweep_jobs(2)
        assert threads.core_limit({}, 2, None, read_quota=False) == 1
        assert threads.core_limit({}, 16, None, read_quota=False) == 8
    finally:
        threads.set_sweep_jobs(1)


def test_cgroup_quota_files(tmp_path):
    proc = tmp_path / "cgroup"
    proc.write_text("0::/job\n")
    (tmp_path / "job").mkdir()
    (tmp_path / "job" / "cpu.max").write_text("150000 100000\n")  # v2: 1.5 CPUs for this process's cgroup
    assert threads.cgroup_cpu_quota(tmp_path, proc) == pytest.approx(1.5)
    (tmp_path / "job" / "cpu.max").write_text("max 100000\n")
    assert threads.cgroup_cpu_quota(tmp_path, proc) is None
    (tmp_path / "cpu").mkdir()
    (tmp_path / "cpu" / "cpu.cfs_quota_us").write_text("300000\n")  # v1: 3 CPUs at the root
    (tmp_path / "cpu" / "cpu.cfs_period_us").write_text("100000\n")
    assert threads.cgroup_cpu_quota(tmp_path, proc) == pytest.approx(3.0)
    (tmp_path / "cpu" / "cpu.cfs_quota_us").write_text("-1\n")
    assert threads.cgroup_cpu_quota(tmp_path, proc) is None
    assert threads.usable_cores(affinity=4, quota=1.5) == 2


def test_candidates():
    assert threads.candidates(2) == [1, 2]
    assert threads.candidates(64) == [1, 2, 3, 4, 5, 6, 7, 8, 16, 32, 64]
    assert threads.candidates(12) == [1, 2, 3, 4, 5, 6, 7, 8, 12]


def test_training_loop_follows_the_run_policy():
    from distillrun.training import LoopSpec, train_loop

    net = torch.nn.Linear(4, 4)
    loss_fn = lambda model, target, batch, g: ((model(batch) - batch) ** 2).mean()  # noqa: E731
    draw = lambda g: torch.randn(64, 4, generator=g)  # noqa: E731
    before = torch.get_num_threads()
    try:
        with threads.run_policy("auto", limit=2) as policy:
            train_loop(net, loss_fn, draw, LoopSpec(iterations=300, lr=1e-3), generator=torch.Generator(), quiet=True)
            label, gov = policy.loops[-1]
            assert label == "train" and isinstance(gov, threads.AutoThreads)
            assert gov.iteration == 300  # every iteration went through the chooser
            # (whether its probe finished within 300 tiny iterations depends on the machine's speed: not asserted)
            assert torch.get_num_threads() in (1, 2)
            if gov.choices:
                assert torch.get_num_threads() == gov.choices[-1].threads
            assert threads.last_summary() == gov.summary()
        with threads.run_policy(1):
            assert torch.get_num_threads() == 1
            train_loop(net, loss_fn, draw, LoopSpec(iterations=5, lr=1e-3), generator=torch.Generator(), quiet=True)
            assert threads.last_summary() == "1"
    finally:
        torch.set_num_threads(before)


def _cfg(*overrides):
    from hydra import compose, initialize_config_module

    from distillrun.config import register_configs

    register_configs()
    with initialize_config_module("distillrun.configs", version_base="1.3"):
        return compose("run", overrides=list(overrides))


def test_auto_is_the_default():
    assert _cfg().compute.threads == "auto"


@pytest.mark.parametrize("value", ["0", "-1", "2.5", "fast", "true", "[1,2]"])
def test_bad_thread_counts_are_one_line(value):
    with pytest.raises(ConfigError) as e:
        validate(_cfg(f"compute.threads={value}"))
    assert e.value.key == "compute.threads" and "auto" in str(e.value) and "\n" not in str(e.value)


@pytest.mark.parametrize("value", ["auto", "1", "3"])
def test_good_thread_counts(value):
    validate(_cfg(f"compute.threads={value}"))


def test_cli_refuses_a_bad_thread_count(capsys):
    from distillrun import cli

    with pytest.raises(SystemExit) as e:
        cli.precheck(["compute.threads=0"])
    assert e.value.code == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("distillrun: error: compute.threads=0")
