"""Multi-node torchrun on one machine (slow tier): two launcher processes, each one "node" of one job, meet at a
c10d rendezvous on the loopback address and train as ranks 0 and 1 of a gloo process group.

Outside references: torchrun (torch.distributed.run) and its c10d rendezvous; the data-parallel invariant is the
one PyTorch's DDP notes state (W ranks with 1/W of the global batch each take the step one process takes on all
of it), checked as tests/test_distributed.py checks it for a single-node torchrun. Only 127.0.0.1 is used:
the rendezvous endpoint, each agent's advertised address (--local-addr) and gloo's interface (GLOO_SOCKET_IFNAME=lo).
"""
import os
import socket
import subprocess
import sys

import pytest
import torch
from safetensors.torch import load_file

pytestmark = pytest.mark.slow

TINY = ["teacher.iterations=60", "teacher.steps=4", "method.iterations=20", "eval.samples=256", "eval.bootstrap=5",
        "eval.projections=16", "compute.threads=1", "quiet=true", "data.n_train=4096", "net.width=32",
        "net.depth=2", "stop.tolerance=1000", "tracking=off"]
ENV = {**os.environ, "OMP_NUM_THREADS": "1", "MLFLOW_DISABLE_TELEMETRY": "true", "GLOO_SOCKET_IFNAME": "lo",
       "PYTHONWARNINGS": "ignore"}


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@pytest.mark.skipif(not hasattr(socket, "if_nameindex") or "lo" not in dict(socket.if_nameindex()).values(),
                    reason="no loopback interface named lo")
def test_two_torchrun_nodes_on_loopback_train_the_same_student_as_one_process(tmp_path):
    port = free_port()
    nodes = [subprocess.Popen(
        [sys.executable, "-m", "torch.distributed.run", "--nnodes=2", "--nproc_per_node=1", f"--node_rank={i}",
         "--rdzv_backend=c10d", f"--rdzv_endpoint=127.0.0.1:{port}", "--rdzv_id=distillrun-two-nodes",
         "--local-addr=127.0.0.1", "-m", "distillrun.cli", *TINY, f"run_dir={tmp_path / 'two'}"],
        cwd=tmp_path, env=ENV, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True) for i in (0, 1)]
    try:
        outs = [p.communicate(timeout=900)[0] for p in nodes]
    finally:
        for p in nodes:
            if p.poll() is None:
                p.kill()
    for p, out in zip(nodes, outs):
        assert p.returncode == 0, out[-3000:]
    # One job of two nodes: exactly one of them holds rank 0 and prints the stage table.
    assert sum(o.count("stage steps") for o in outs) == 1, outs
    one = subprocess.run([sys.executable, "-m", "distillrun.cli", *TINY, f"run_dir={tmp_path / 'one'}"],
                         cwd=tmp_path, env=ENV, capture_output=True, text=True, timeout=900)
    assert one.returncode == 0, one.stderr[-2000:]
    for part in ("teacher", "stage-01", "stage-02"):
        a = load_file(tmp_path / "two" / part / "weights.safetensors")
        b = load_file(tmp_path / "one" / part / "weights.safetensors")
        assert a.keys() == b.keys()
        for k in a:  # float tolerance: the two ranks sum their halves of the batch in another order
            torch.testing.assert_close(a[k], b[k], rtol=1e-5, atol=1e-6)
