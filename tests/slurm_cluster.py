"""A private single-node SLURM cluster for the slow tests: munged, MariaDB, slurmdbd, slurmctld and slurmd from
Debian's packages (tests/setup_slurm.sh installs them), every file they touch (configs, munge key and socket,
database, pid files, spool and state folders, logs) inside one temporary folder, on free loopback ports.

Setup follows SLURM's own slurm.conf(5), slurmdbd.conf(5) and munged(8) manual pages: proctrack/linuxproc,
task/none, no cgroups, all daemons as root, one node named after `hostname -s` with the CPUs and memory
`slurmd -C` reports. Job accounting (slurmdbd over a private MariaDB) is on because submitit, under Hydra's
SLURM launcher, learns a job's end from `sacct`: without it a job that dies before writing its result
(failed, cancelled, killed) is never seen to finish and the sweep waits forever.
Every daemon runs in the foreground as a child of this process, so the ids it stops are the ids it started;
nothing is ever stopped by name.
"""
from __future__ import annotations

import os
import shutil
import signal
import socket
import subprocess
import time
from pathlib import Path

SETUP = Path(__file__).with_name("setup_slurm.sh")
BINARIES = ("munged", "slurmctld", "slurmd", "slurmdbd", "sinfo", "sbatch", "squeue", "scancel", "sacct", "sacctmgr",
            "mariadbd", "mariadb-install-db")


class ClusterUnavailable(Exception):
    """This machine cannot host the cluster (the reason is the message); tests skip."""


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def listening(port: int) -> bool:
    with socket.socket() as s:
        s.settimeout(0.5)
        return s.connect_ex(("127.0.0.1", port)) == 0


def ensure_installed() -> None:
    """Install the Debian packages where a binary is missing, or say why that cannot happen."""
    if os.name != "posix" or os.geteuid() != 0:
        raise ClusterUnavailable("the SLURM daemons run as root here (SlurmUser=root); rerun the slow tier as root")
    if all(shutil.which(b) for b in BINARIES):
        return
    res = subprocess.run(["bash", str(SETUP)], capture_output=True, text=True)
    if res.returncode != 0 or not all(shutil.which(b) for b in BINARIES):
        why = (res.stderr.strip().splitlines() or ["binaries still missing after install"])[-1]
        raise ClusterUnavailable(f"could not install the SLURM, munge and MariaDB packages: {why}")


def node_line() -> str:
    """`NodeName=<short hostname> CPUs=... RealMemory=...` as slurmd -C measures this machine."""
    out = subprocess.run(["slurmd", "-C"], capture_output=True, text=True, check=True).stdout
    line = out.splitlines()[0]
    host = socket.gethostname().split(".")[0]
    assert line.startswith(f"NodeName={host} "), line
    return line + " NodeAddr=127.0.0.1 State=UNKNOWN"


class SlurmCluster:
    """start() brings it up and waits for an idle node; stop() takes it down. `env` is what clients need."""

    def __init__(self, root: Path, deadline_s: float = 60.0):
        self.root = Path(root)
        self.deadline_s = deadline_s
        self.procs: dict[str, subprocess.Popen] = {}
        self.timings: dict[str, float] = {}
        self.host = socket.gethostname().split(".")[0]
        self.conf = self.root / "slurm.conf"
        self.munge_socket = self.root / "munge" / "munge.socket"
        # SLURM_CONF for every client and daemon; slurmdbd reads slurmdbd.conf from the same folder.
        self.env = {**os.environ, "SLURM_CONF": str(self.conf)}
        for var in [k for k in self.env if k.startswith(("SLURM_", "SBATCH_", "SALLOC_", "SRUN_"))]:
            if var != "SLURM_CONF":
                del self.env[var]  # nothing from an outer allocation leaks into ours

    def write_config(self) -> None:
        r = self.root
        for d in ("munge", "state", "spool", "log", "db"):
            (r / d).mkdir(parents=True, exist_ok=True)
        os.chmod(r / "munge", 0o755)  # munged wants its socket folder searchable by all
        key = r / "munge" / "munge.key"
        key.write_bytes(os.urandom(1024))
        os.chmod(key, 0o400)
        self.db_port, self.dbd_port = free_port(), free_port()
        dbd = r / "slurmdbd.conf"
        dbd.write_text("\n".join([
            "AuthType=auth/munge",
            f"AuthInfo=socket={self.munge_socket}",
            "DbdHost=localhost",
            "DbdAddr=127.0.0.1",
            f"DbdPort={self.dbd_port}",
            "SlurmUser=root",
            "StorageType=accounting_storage/mysql",
            "StorageHost=127.0.0.1",
            f"StoragePort={self.db_port}",
            "StorageUser=root",
            "StorageLoc=slurm_acct_db",
            f"PidFile={r / 'slurmdbd.pid'}",
            f"LogFile={r / 'log' / 'slurmdbd.log'}",
            "",
        ]))
        os.chmod(dbd, 0o600)  # slurmdbd refuses a config others can read
        self.conf.write_text("\n".join([
            "ClusterName=distillrun-test",
            f"SlurmctldHost={self.host}(127.0.0.1)",
            f"SlurmctldPort={free_port()}",
            f"SlurmdPort={free_port()}",
            "SlurmUser=root",
            "SlurmdUser=root",
            "AuthType=auth/munge",
            "CredType=cred/munge",
            f"AuthInfo=socket={self.munge_socket}",
            f"StateSaveLocation={r / 'state'}",
            f"SlurmdSpoolDir={r / 'spool'}",
            f"SlurmctldPidFile={r / 'slurmctld.pid'}",
            f"SlurmdPidFile={r / 'slurmd.pid'}",
            f"SlurmctldLogFile={r / 'log' / 'slurmctld.log'}",
            f"SlurmdLogFile={r / 'log' / 'slurmd.log'}",
            "ProctrackType=proctrack/linuxproc",
            "TaskPlugin=task/none",
            "JobAcctGatherType=jobacct_gather/none",
            "AccountingStorageType=accounting_storage/slurmdbd",
            "AccountingStorageHost=127.0.0.1",
            f"AccountingStoragePort={self.dbd_port}",
            f"AccountingStoragePass={self.munge_socket}",  # the munge socket for talking to slurmdbd
            "JobCompType=jobcomp/none",
            "MpiDefault=none",
            "SwitchType=switch/none",
            "SchedulerType=sched/backfill",
            "SelectType=select/cons_tres",
            "SelectTypeParameters=CR_Core",
            "ReturnToService=2",
            # Seconds between SIGTERM and SIGKILL when a job is cancelled. submitit ignores SIGTERM (it waits for
            # SIGKILL or its own USR2), so a cancelled job runs on for this long: short, to stop mid-stage.
            "KillWait=1",
            "MinJobAge=600",  # finished jobs stay visible to squeue/scontrol for the test's checks
            "SlurmctldTimeout=30",
            "SlurmdTimeout=30",
            node_line(),
            f"PartitionName=local Nodes={self.host} Default=YES MaxTime=INFINITE State=UP",
            "",
        ]))

    def _spawn(self, name: str, argv: list[str]) -> None:
        log = open(self.root / "log" / f"{name}.out", "wb")
        self.procs[name] = subprocess.Popen(argv, stdout=log, stderr=subprocess.STDOUT, env=self.env,
                                            start_new_session=True)
        log.close()

    def _wait(self, what: str, ready, deadline: float) -> None:
        while time.monotonic() < deadline:
            for name, p in self.procs.items():
                if p.poll() is not None:
                    raise RuntimeError(f"{name} exited with {p.returncode} while waiting for {what}; "
                                       f"see {self.root / 'log'}:\n{self.log_tail(name)}")
            if ready():
                return
            time.sleep(0.1)
        raise RuntimeError(f"no {what} within {self.deadline_s:.0f} s; see {self.root / 'log'}")

    def log_tail(self, name: str, n: int = 20) -> str:
        text = ""
        for f in (self.root / "log" / f"{name}.out", self.root / "log" / f"{name}.log"):
            if f.exists():
                text += f.read_text(errors="replace")
        return "\n".join(text.splitlines()[-n:])

    def start(self) -> "SlurmCluster":
        t0 = time.monotonic()
        deadline = t0 + self.deadline_s
        self.write_config()
        m = self.root / "munge"
        self._spawn("munged", ["munged", "--foreground", f"--socket={self.munge_socket}",
                               f"--key-file={m / 'munge.key'}", f"--pid-file={m / 'munged.pid'}",
                               f"--log-file={self.root / 'log' / 'munged.log'}", f"--seed-file={m / 'munged.seed'}"])
        self._wait("munge socket", self.munge_socket.exists, deadline)
        db = self.root / "db"
        init = subprocess.run(["mariadb-install-db", "--no-defaults", f"--datadir={db / 'data'}", "--user=root",
                               "--skip-test-db", "--auth-root-authentication-method=normal"],
                              capture_output=True, text=True, env=self.env)
        if init.returncode:
            raise RuntimeError(f"mariadb-install-db failed: {init.stderr.strip()[-500:]}")
        self._spawn("mariadbd", ["mariadbd", "--no-defaults", f"--datadir={db / 'data'}", "--user=root",
                                 "--bind-address=127.0.0.1", f"--port={self.db_port}", f"--socket={db / 'mysqld.sock'}",
                                 f"--pid-file={db / 'mariadbd.pid'}", "--skip-name-resolve", "--skip-grant-tables",
                                 "--innodb-buffer-pool-size=32M",
                                 "--innodb-lock-wait-timeout=900", f"--log-error={self.root / 'log' / 'mariadbd.log'}"])
        self._wait("MariaDB on its port", lambda: listening(self.db_port), deadline)
        self._spawn("slurmdbd", ["slurmdbd", "-D"])
        self._wait("slurmdbd on its port", lambda: listening(self.dbd_port), deadline)
        self.run("sacctmgr", "-i", "add", "cluster", "distillrun-test")
        # -D foreground, -i ignore saved state from elsewhere; -f our config for both daemons.
        self._spawn("slurmctld", ["slurmctld", "-D", "-i", "-f", str(self.conf)])
        self._spawn("slurmd", ["slurmd", "-D", "-f", str(self.conf), "-N", self.host])
        self._wait("idle node in sinfo", lambda: self.node_state() == "idle", deadline)
        self.timings["bring_up_s"] = time.monotonic() - t0
        return self

    def run(self, *argv: str, check: bool = True, timeout: float = 30) -> subprocess.CompletedProcess:
        res = subprocess.run(argv, env=self.env, capture_output=True, text=True, timeout=timeout)
        if check and res.returncode:
            raise RuntimeError(f"{' '.join(argv)} exited with {res.returncode}: {res.stderr.strip()[-800:]}")
        return res

    def node_state(self) -> str:
        res = self.run("sinfo", "-h", "-N", "-n", self.host, "-o", "%T", check=False, timeout=10)
        return res.stdout.strip() if res.returncode == 0 else ""

    def jobs(self) -> list[str]:
        """Ids of the jobs the controller still holds as pending or running."""
        res = self.run("squeue", "-h", "-o", "%i", "-t", "PD,R,CG,CF,S", check=False, timeout=10)
        return res.stdout.split() if res.returncode == 0 else []

    def job_state(self, job_id: str) -> str:
        """State of a job as the controller records it (kept for MinJobAge after it ends)."""
        out = self.run("scontrol", "show", "job", "-o", job_id, check=False).stdout
        field = next((f for f in out.split() if f.startswith("JobState=")), "JobState=")
        return field.split("=", 1)[1]

    def stop(self) -> None:
        """Cancel what is left, then stop the daemons this object started, by the pids it recorded."""
        t0 = time.monotonic()
        pids = {name: p.pid for name, p in self.procs.items()}  # read before anything is stopped
        if "slurmctld" in pids and self.procs["slurmctld"].poll() is None:
            left = self.jobs()
            if left:
                self.run("scancel", *left, check=False)
                end = time.monotonic() + 30
                while self.jobs() and time.monotonic() < end:
                    time.sleep(0.2)
        for name in ("slurmd", "slurmctld", "slurmdbd", "mariadbd", "munged"):
            p = self.procs.get(name)
            if p is None or p.poll() is not None:
                continue
            os.kill(pids[name], signal.SIGTERM)
            try:
                p.wait(timeout=15)
            except subprocess.TimeoutExpired:
                os.kill(pids[name], signal.SIGKILL)
                p.wait(timeout=5)
        self.timings["teardown_s"] = time.monotonic() - t0
