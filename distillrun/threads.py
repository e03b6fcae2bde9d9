"""Torch's intra-op thread count: a fixed number (compute.threads=N), or the count that trains fastest here and
now, found by timing the training loop itself (compute.threads=auto, the default).

Why measure instead of fixing a number: on an idle 2-core machine 2 threads train a 2D stage ~1.5-1.8x faster
than 1, but with one other busy process on the machine 2 threads ran 3-6x slower than 1 (every parallel op
waits for its sibling thread while the scheduler has it off the CPU). On a bigger machine a fixed 2 leaves most
cores idle. No fixed value suits all of these, and the load can change during a run.

How (`AutoThreads`): the first iterations of every training loop (the teacher's and each stage's) run in short
timed bursts at each candidate count, from 1 up to the cores this process may use, in the order 1..L then
L..1 (so a load that changes during the probe biases no candidate); the loop then continues at the fastest.
After that its throughput is watched in windows of a few seconds: when a window is markedly slower or faster
than the first one after the choice, or a minute has passed, the candidates are timed again. The timed
iterations are ordinary training iterations (nothing is thrown away); the cost of a probe is only that a few
bursts run at the slower counts. Each choice is one log line and goes into the stage's record (and MLflow).

The cores this process may use (`core_limit`): its CPU affinity, capped by a container's CPU quota (cgroup v2
cpu.max, or v1 cpu.cfs_quota_us / cpu.cfs_period_us), divided among the processes started together to share
them: torchrun's ranks on this node (LOCAL_WORLD_SIZE) and the jobs the parallel sweep launcher runs at once
(`set_sweep_jobs`, called by the CLI from Hydra's launcher config).

Numbers: a different thread count can round reductions differently, so a run with `auto` is reproducible to
float round-off, not bit for bit; a fixed count keeps resume bit-exact (see training.train_loop).
"""
from __future__ import annotations

import contextlib
import logging
import math
import os
import time
from contextvars import ContextVar
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

log = logging.getLogger(__name__)

AUTO = "auto"
CGROUP_ROOT = Path("/sys/fs/cgroup")


# ----------------------------------------------------------------------------------- cores we may use
def cgroup_cpu_quota(root: Path = CGROUP_ROOT, proc_cgroup: Path = Path("/proc/self/cgroup")) -> float | None:
    """CPUs granted by the container's quota (e.g. 1.5), or None when unlimited or unknown.
    cgroup v2: "<quota> <period>" in cpu.max ("max" = no limit); v1: cpu.cfs_quota_us / cpu.cfs_period_us
    (quota -1 = no limit). Read at this process's own cgroup path and at the root; the smallest limit wins."""
    paths: list[str] = [""]
    with contextlib.suppress(OSError):
        for line in proc_cgroup.read_text().splitlines():
            parts = line.split(":", 2)
            if len(parts) == 3 and parts[2] not in ("", "/"):
                paths.append(parts[2].lstrip("/"))
    quotas = []
    for rel in paths:
        for folder in (root / rel, root / "cpu" / rel, root / "cpu,cpuacct" / rel):
            q = _read_quota(folder)
            if q is not None:
                quotas.append(q)
    return min(quotas) if quotas else None


def _read_quota(folder: Path) -> float | None:
    with contextlib.suppress(OSError, ValueError, IndexError):
        text = (folder / "cpu.max").read_text().split()
        if text[0] != "max" and float(text[1]) > 0:
            return float(text[0]) / float(text[1])
        return None
    with contextlib.suppress(OSError, ValueError):
        quota = float((folder / "cpu.cfs_quota_us").read_text())
        period = float((folder / "cpu.cfs_period_us").read_text())
        if quota > 0 and period > 0:
            return quota / period
    return None


def usable_cores(affinity: int | None = None, quota: float | None = None) -> int:
    """Cores this process may run on: its affinity mask (os.sched_getaffinity), at most the quota rounded up."""
    if affinity is None:
        try:
            affinity = len(os.sched_getaffinity(0))
        except (AttributeError, OSError):  # no affinity API (macOS): all CPUs
            affinity = os.cpu_count() or 1
    cores = max(1, affinity)
    if quota is not None and quota > 0:
        cores = min(cores, max(1, math.ceil(quota - 1e-9)))
    return cores


_SWEEP_JOBS = 1  # jobs of a parallel sweep running at once (set by the CLI from Hydra's launcher config)


def set_sweep_jobs(jobs: int) -> None:
    global _SWEEP_JOBS
    _SWEEP_JOBS = max(1, int(jobs))


def processes_sharing(env: dict | None = None) -> int:
    """Processes started together on this machine that split its cores: torchrun's local ranks times the
    parallel sweep's concurrent jobs."""
    env = os.environ if env is None else env
    try:
        local = int(env.get("LOCAL_WORLD_SIZE", "1"))
    except ValueError:
        local = 1
    return max(1, local) * _SWEEP_JOBS


def core_limit(env: dict | None = None, affinity: int | None = None, quota: float | None = None,
               read_quota: bool = True) -> int:
    """The most intra-op threads `auto` will try: usable cores / processes sharing them, at least 1."""
    if quota is None and read_quota:
        quota = cgroup_cpu_quota()
    return max(1, usable_cores(affinity, quota) // processes_sharing(env))


def joblib_jobs(launcher: dict | None, cpus: int | None = None) -> int:
    """Concurrent jobs of Hydra's joblib launcher from its config (n_jobs; joblib's rule for negative values:
    -1 = all CPUs, -2 = all but one, ...). 1 for any other launcher."""
    if not launcher or "joblib" not in str(launcher.get("_target_", "")).lower():
        return 1
    cpus = cpus or os.cpu_count() or 1
    n = launcher.get("n_jobs", -1)
    try:
        n = int(n)
    except (TypeError, ValueError):
        return 1
    if n < 0:
        n = cpus + 1 + n
    return max(1, n)


def candidates(limit: int) -> list[int]:
    """Thread counts to time: every count up to 8, above that powers of two and the limit itself."""
    if limit <= 8:
        return list(range(1, limit + 1))
    out = list(range(1, 9))
    n = 16
    while n < limit:
        out.append(n)
        n *= 2
    return out + [limit]


# ----------------------------------------------------------------------------------------- the chooser
@dataclass
class Choice:
    loop: str  # which training loop ("teacher", "stage 3 (32 steps)")
    iteration: int  # loop iteration at which the choice took effect
    threads: int
    reason: str  # start | slower | faster | periodic | single core
    rates: dict[int, float] = field(default_factory=dict)  # iterations per second measured per candidate

    def line(self) -> str:
        measured = ", ".join(f"{n}: {r:.1f} it/s" for n, r in sorted(self.rates.items()))
        why = {"start": "at loop start", "slower": "throughput dropped", "faster": "throughput rose",
               "periodic": "periodic re-check", "single core": "only one core usable"}.get(self.reason, self.reason)
        return (f"threads: {self.loop}: {self.threads} from iteration {self.iteration} ({why}"
                + (f"; measured {measured}" if measured else "") + ")")


class FixedThreads:
    """compute.threads=N: nothing to decide (the count was set once for the run)."""

    def __init__(self, threads: int | None = None):
        self.threads = threads
        self.choices: list[Choice] = []

    def begin(self) -> None:
        pass

    def end(self) -> None:
        pass

    def summary(self) -> str | None:
        return None if self.threads is None else str(self.threads)


class AutoThreads:
    """Chooses the intra-op thread count for one training loop by timing its own iterations.

    Call `begin()` right before and `end()` right after the timed part of every iteration. `clock` returns
    seconds; `apply(n)` sets the thread count (torch.set_num_threads); `on_choice(Choice)` hears each decision.
    Probe: per slot of the schedule 1..L, L..1 (`rounds` passes), `settle` untimed iterations after switching,
    then timed ones until at least `burst_iters` iterations and `burst_seconds`. A candidate whose slot (settling
    included) already took `give_up` times what the best finished candidate needs for as many iterations (at
    least `burst_iters`) is hopeless: its slot ends at once and it leaves the later passes, as does any candidate
    below 1 / `give_up` of the best rate after the first pass (under a busy competitor one 2-thread iteration can
    cost ten 1-thread ones, so a full burst there would cost more than the choice gains).
    Watch: windows of at least `window_iters` iterations and `window_seconds`; the first sets the baseline, a
    later one below (1 - change) x baseline or above baseline / (1 - change) probes again, as does
    `recheck_seconds` of loop time (None: never); a periodic re-check that keeps the count doubles that interval
    (up to 8x), a change resets it."""

    def __init__(self, limit: int, label: str = "train", *, clock: Callable[[], float] = time.perf_counter,
                 apply: Callable[[int], None] | None = None, on_choice: Callable[[Choice], None] | None = None,
                 rounds: int = 2, settle: int = 1, burst_iters: int = 3, burst_seconds: float = 0.3,
                 window_iters: int = 10, window_seconds: float = 3.0, change: float = 0.35,
                 recheck_seconds: float | None = 60.0, give_up: float = 1.5):
        if apply is None:
            import torch
            apply = torch.set_num_threads
        self.limit, self.label, self.clock, self.apply, self.on_choice = max(1, int(limit)), label, clock, apply, on_choice
        self.rounds, self.settle, self.burst_iters, self.burst_seconds = rounds, settle, burst_iters, burst_seconds
        self.window_iters, self.window_seconds, self.change = window_iters, window_seconds, change
        self.recheck_seconds, self._recheck, self.give_up = recheck_seconds, recheck_seconds, give_up
        self.choices: list[Choice] = []
        self.threads = self.threads_chosen = self.limit
        self.iteration = 0  # iterations seen (begin/end pairs completed)
        self._t0: float | None = None
        self._since_choice = 0.0  # timed seconds since the last choice (for the periodic re-check)
        if self.limit == 1:
            self._choose(1, "single core", {})
        else:
            self._start_probe("start")

    # -- probe
    def _start_probe(self, reason: str) -> None:
        order = candidates(self.limit)
        self._schedule = [n for r in range(self.rounds) for n in (order if r % 2 == 0 else order[::-1])]
        self._round_end = len(order)  # slot index where the first pass ends
        self._slot, self._reason, self._dropped = -1, reason, set()
        self._spent: dict[int, list[float]] = {n: [0.0, 0] for n in order}  # seconds, iterations
        self._next_slot()

    def _rates(self) -> dict[int, float]:
        return {n: it / s if s > 0 else math.inf for n, (s, it) in self._spent.items() if it > 0}

    def _next_slot(self) -> None:
        self._slot += 1
        if self._slot == self._round_end:  # after the first pass: drop the clearly slower candidates
            rates = self._rates()
            top = max(rates.values(), default=0.0)
            self._dropped |= {n for n, r in rates.items() if r * self.give_up < top}
        while self._slot < len(self._schedule) and self._schedule[self._slot] in self._dropped:
            self._slot += 1
        if self._slot >= len(self._schedule):
            rates = self._rates()
            best = max(rates, key=lambda n: (rates[n], -n))  # ties: fewer threads
            self._choose(best, self._reason, rates)
            return
        self.threads = self._schedule[self._slot]
        self.apply(self.threads)
        self._settle_left, self._burst, self._slot_total = self.settle, [0.0, 0], [0.0, 0]

    def _hopeless(self) -> bool:
        """This slot already took `give_up` x what the fastest finished candidate needs for as many iterations."""
        finished = [s / it for n, (s, it) in self._spent.items() if it > 0 and n != self.threads]
        if not finished:
            return False
        seconds, iters = self._slot_total
        return seconds > self.give_up * min(finished) * max(iters, self.burst_iters)

    def _probe_step(self, seconds: float) -> None:
        self._slot_total[0] += seconds
        self._slot_total[1] += 1
        if self._hopeless():
            spent = self._spent[self.threads]
            spent[0] += self._slot_total[0]  # settling included: a lower bound of its cost, enough to rank it last
            spent[1] += self._slot_total[1]
            self._dropped.add(self.threads)
            self._next_slot()
            return
        if self._settle_left > 0:
            self._settle_left -= 1
            return
        self._burst[0] += seconds
        self._burst[1] += 1
        if self._burst[1] < self.burst_iters or self._burst[0] < self.burst_seconds:
            return
        spent = self._spent[self.threads]
        spent[0] += self._burst[0]
        spent[1] += self._burst[1]
        self._next_slot()

    # -- watch
    def _choose(self, n: int, reason: str, rates: dict) -> None:
        if self.recheck_seconds is not None:  # a periodic re-check that changed nothing: look again less often
            same = reason == "periodic" and n == self.threads_chosen
            self._recheck = min(self._recheck * 2, 8 * self.recheck_seconds) if same else self.recheck_seconds
        self.threads_chosen = n
        self._schedule = None
        self.threads = n
        self.apply(n)
        self._window, self._baseline, self._since_choice = [0.0, 0], None, 0.0
        choice = Choice(self.label, self.iteration, n, reason, rates)
        self.choices.append(choice)
        if self.on_choice is not None:
            self.on_choice(choice)

    def _watch_step(self, seconds: float) -> None:
        if self.limit == 1:
            return
        self._since_choice += seconds
        self._window[0] += seconds
        self._window[1] += 1
        if self._window[1] < self.window_iters or self._window[0] < self.window_seconds:
            return
        rate = self._window[1] / self._window[0] if self._window[0] > 0 else math.inf
        self._window = [0.0, 0]
        if self._baseline is None:
            self._baseline = rate
        elif rate < (1 - self.change) * self._baseline:
            self._start_probe("slower")
        elif rate * (1 - self.change) > self._baseline:
            self._start_probe("faster")
        elif self._recheck is not None and self._since_choice >= self._recheck:
            self._start_probe("periodic")

    # -- the loop's hooks
    def begin(self) -> None:
        self._t0 = self.clock()

    def end(self) -> None:
        if self._t0 is None:
            return
        seconds = max(self.clock() - self._t0, 0.0)
        self._t0 = None
        self.iteration += 1
        if self._schedule is not None:
            self._probe_step(seconds)
        else:
            self._watch_step(seconds)

    def summary(self) -> str | None:
        """The choices of this loop in one short text: "2" or "2 (it 0), 1 (it 412: slower)"."""
        if not self.choices:
            return None
        if len(self.choices) == 1:
            return str(self.choices[0].threads)
        return ", ".join(f"{c.threads} (it {c.iteration}{'' if c.reason == 'start' else ': ' + c.reason})"
                         for c in self.choices)


# ------------------------------------------------------------------------------------ the run's policy
class ThreadPolicy:
    """The run's compute.threads: hands each training loop its governor and keeps every loop's choices."""

    def __init__(self, setting, limit: int | None = None, probe: bool = True):
        self.setting = setting
        self.auto = setting == AUTO and probe  # on a GPU the host's thread count hardly matters: no probing
        self.limit = (limit if limit is not None else core_limit()) if setting == AUTO else int(setting)
        self.loops: list[tuple[str, AutoThreads | FixedThreads]] = []

    def governor(self, label: str):
        gov = AutoThreads(self.limit, label, on_choice=_log_choice) if self.auto else FixedThreads(self.limit)
        self.loops.append((label, gov))
        return gov

    def last_summary(self) -> str | None:
        return self.loops[-1][1].summary() if self.loops else None


def _log_choice(choice: Choice) -> None:
    log.info(choice.line())


_POLICY: ContextVar[ThreadPolicy | None] = ContextVar("thread_policy", default=None)


def apply_setting(setting, limit: int | None = None, probe: bool = True) -> ThreadPolicy:
    """Set torch's thread count for compute.threads (auto: the core limit until a loop measures) and return
    the policy; a fixed count is exactly that count. probe=False (GPU runs): auto means the core limit."""
    import torch

    policy = ThreadPolicy(setting, limit, probe)
    torch.set_num_threads(policy.limit)
    return policy


@contextlib.contextmanager
def run_policy(setting, limit: int | None = None, probe: bool = True):
    """Within this block training loops follow compute.threads=`setting` (see train_loop)."""
    policy = apply_setting(setting, limit, probe)
    if policy.auto:
        log.info(f"threads: auto, trying 1 to {policy.limit} (usable cores {usable_cores()}, "
                 f"shared by {processes_sharing()} process(es))")
    token = _POLICY.set(policy)
    try:
        yield policy
    finally:
        _POLICY.reset(token)


def governor(label: str):
    """The current run's governor for a new training loop; outside a run (tests, library use) a no-op."""
    policy = _POLICY.get()
    return policy.governor(label) if policy is not None else FixedThreads()


def last_summary() -> str | None:
    """What the last training loop of the current run chose ("2", or each change), None when fixed."""
    policy = _POLICY.get()
    return policy.last_summary() if policy is not None else None


def is_auto(setting) -> bool:
    return setting == AUTO


def describe_machine() -> str:
    """CPU model, cores and the vector/matrix flags that decide which kernels run (for benchmark headers)."""
    model, flags = "unknown", set()
    with contextlib.suppress(OSError):
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            key, _, value = line.partition(":")
            if key.strip() == "model name" and model == "unknown":
                model = value.strip()
            elif key.strip() == "flags" and not flags:
                flags = set(value.split())
    shown = [f for f in ("avx", "avx2", "fma", "avx512f", "avx512_bf16", "avx512_vnni", "amx_tile") if f in flags]
    return (f"CPU {model}, {os.cpu_count()} logical CPUs, usable {usable_cores()}, "
            f"quota {cgroup_cpu_quota() or 'none'}; flags: {' '.join(shown) or 'none of avx/avx2/avx512'}")
