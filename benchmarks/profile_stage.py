"""Where a stage iteration's time goes beyond the network: torch.profiler op tables of the three loops that
overhead.py times (stage, teacher evaluations, bare training step), subtracted op by op.

For each (op, input shapes): stage - teacher - bare, in ms per iteration (self CPU time). Positive rows are
work the stage loop does that the network's own training step and the teacher's evaluations do not: the
method's schedule math, the EMA, the gradient norm, data drawing. Profiler overhead inflates small ops, so
read the ranking, not the absolute numbers; overhead.py has the timings.

Usage (repository root): OMP_NUM_THREADS=1 python benchmarks/profile_stage.py [--scenario consistency-2d] [--rows 25]
"""
import argparse
import collections
import copy
import sys
from pathlib import Path

import torch
from torch.profiler import ProfilerActivity, profile

sys.path.insert(0, str(Path(__file__).parent))
import overhead  # noqa: E402


def op_table(fn, iterations: int) -> collections.Counter:
    fn()  # warm-up outside the profile
    with profile(activities=[ProfilerActivity.CPU], record_shapes=True) as prof:
        fn()
    table = collections.Counter()
    for e in prof.key_averages(group_by_input_shape=True):
        table[(e.key, str(e.input_shapes)[:60])] += e.self_cpu_time_total / iterations / 1e3
    return table


def main():
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--scenario", default="consistency-2d", choices=list(overhead.SCENARIOS))
    p.add_argument("--iterations", type=int, default=20)
    p.add_argument("--rows", type=int, default=25)
    p.add_argument("--threads", type=int, default=1)
    a = p.parse_args()
    torch.set_num_threads(a.threads)
    cfg, data, teacher, student, net, loss_fn, spec, batch = overhead.build(overhead.SCENARIOS[a.scenario])
    draw = data.batches(batch, torch.device("cpu"))
    n_teacher, n_target = overhead.evals_per_update(student, net, teacher, loss_fn, draw, spec)
    batches = overhead.inputs(data, batch)
    bare_net, target_net = copy.deepcopy(net).requires_grad_(True), copy.deepcopy(net).requires_grad_(False)
    n = a.iterations
    tables = {
        "stage": op_table(lambda: overhead.stage_loop(student, loss_fn, draw, spec, n, 0), n),
        "teacher": op_table(lambda: overhead.teacher_loop(teacher.net, target_net, n_teacher, n_target, batches, n), n),
        "bare": op_table(lambda: overhead.bare_loop(bare_net, spec.lr, batches, n), n),
    }
    totals = {k: sum(v.values()) for k, v in tables.items()}
    print(f"{a.scenario}: {n} iterations, {a.threads} thread(s); profiled self CPU ms per iteration: "
          + ", ".join(f"{k} {v:.2f}" for k, v in totals.items()))
    rows = []
    for key in set().union(*tables.values()):
        s, t, b = (tables[k].get(key, 0.0) for k in ("stage", "teacher", "bare"))
        rows.append((s - t - b, s, t, b, key))
    rows.sort(reverse=True)
    print(f"{'extra':>7} {'stage':>7} {'teacher':>7} {'bare':>7}  op, input shapes")
    for extra, s, t, b, (op, shapes) in rows[:a.rows]:
        print(f"{extra:>7.3f} {s:>7.3f} {t:>7.3f} {b:>7.3f}  {op} {shapes}")


if __name__ == "__main__":
    main()
