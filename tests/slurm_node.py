"""A single-node SLURM cluster on this machine, for the tests that submit real batch jobs.

Started once per test session (see ``conftest.slurm``) from Debian's packages (``slurmctld slurmd
slurm-client munge``; ``.ci/install-slurm`` installs them), with every file of its own in a temporary
folder and its own ports, so that a SLURM already configured on the machine is never touched.  It
needs root (the daemons run as root) and the packages; :func:`why_not` says what is missing.

What it takes on a machine without systemd: munged running as its own user with ``/run/munge`` owned
by it; ``proctrack/linuxproc`` and ``task/none`` (no cgroups); consumable cores and memory with a
default memory per core, so a job without ``--mem`` does not take the whole node; the node's line from
``slurmd -C``, reached at 127.0.0.1 and with a little less memory than it reports; finished jobs kept
long enough to read their exit codes.  Jobs outlive ``slurmd``, so :meth:`SlurmNode.stop` cancels them
before stopping the daemons by their process ids.

Run by hand: ``python tests/slurm_node.py`` starts a node, prints its ``SLURM_CONF`` and stops it on Enter.
"""

from __future__ import annotations

import os
import shutil
import signal
import socket
import subprocess
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path

DAEMONS = ("slurmctld", "slurmd", "sbatch", "squeue", "scancel", "sinfo", "munged", "runuser")
MUNGE_RUN = Path("/run/munge")


def why_not() -> str | None:
    """Why a SLURM node cannot be started here, or None when it can."""
    if not hasattr(os, "geteuid") or os.geteuid() != 0:
        return "starting the SLURM daemons needs root"
    missing = [name for name in DAEMONS if not shutil.which(name) and not Path("/usr/sbin", name).exists()]
    if missing:
        return (f"SLURM is not installed ({', '.join(missing)} missing); as root, .ci/install-slurm installs "
                "slurmctld slurmd slurm-client munge with apt-get")
    return None


def _program(name: str) -> str:
    return shutil.which(name) or str(Path("/usr/sbin", name))


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _munge_works() -> bool:
    try:
        token = subprocess.run(["munge", "-n"], capture_output=True, timeout=10)
        return token.returncode == 0 and subprocess.run(["unmunge"], input=token.stdout, capture_output=True,
                                                        timeout=10).returncode == 0
    except (OSError, subprocess.TimeoutExpired):
        return False


def _start_munge() -> int | None:
    """Start munged as the munge user unless one already answers; return the pid of the one started."""
    if _munge_works():
        return None
    MUNGE_RUN.mkdir(mode=0o755, exist_ok=True)
    shutil.chown(MUNGE_RUN, "munge", "munge")
    if not Path("/etc/munge/munge.key").exists():
        subprocess.run(["runuser", "-u", "munge", "--", _program("mungekey"), "--create"], check=True, timeout=30)
    subprocess.run(["runuser", "-u", "munge", "--", _program("munged")], check=True, timeout=30,
                   capture_output=True)
    for _ in range(50):
        if _munge_works():
            return int((MUNGE_RUN / "munged.pid").read_text())
        time.sleep(0.1)
    raise RuntimeError("munged started but does not answer")


def _node_line() -> tuple[str, int]:
    """The node's line from ``slurmd -C`` (without its memory and uptime) and the memory it reports in MB."""
    text = subprocess.run([_program("slurmd"), "-C"], capture_output=True, text=True, check=True,
                          timeout=30).stdout.splitlines()[0]
    fields = dict(item.split("=", 1) for item in text.split())
    memory = int(fields.pop("RealMemory"))
    return " ".join(f"{k}={v}" for k, v in fields.items()), memory


def slurm_conf(folder: Path) -> str:
    node, memory = _node_line()
    name = node.split()[0].split("=", 1)[1]
    return "\n".join([
        "ClusterName=climodes-test",
        f"SlurmctldHost={name}(127.0.0.1)",
        f"SlurmctldPort={_free_port()}",
        f"SlurmdPort={_free_port()}",
        "SlurmUser=root",
        "SlurmdUser=root",
        "AuthType=auth/munge",
        f"StateSaveLocation={folder / 'state'}",
        f"SlurmdSpoolDir={folder / 'spool'}",
        f"SlurmctldPidFile={folder / 'slurmctld.pid'}",
        f"SlurmdPidFile={folder / 'slurmd.pid'}",
        f"SlurmctldLogFile={folder / 'slurmctld.log'}",
        f"SlurmdLogFile={folder / 'slurmd.log'}",
        "ProctrackType=proctrack/linuxproc",
        "TaskPlugin=task/none",
        "SelectType=select/cons_tres",
        "SelectTypeParameters=CR_Core_Memory",
        "DefMemPerCPU=1000",
        "SchedulerParameters=batch_sched_delay=0",
        "MinJobAge=3600",
        "ReturnToService=2",
        "JobAcctGatherType=jobacct_gather/none",
        "AccountingStorageType=accounting_storage/none",
        "MpiDefault=none",
        f"{node} NodeAddr=127.0.0.1 RealMemory={int(memory * 0.8)} State=UNKNOWN",
        "PartitionName=test Nodes=ALL Default=YES MaxTime=INFINITE State=UP",
        "",
    ])


@dataclass
class SlurmNode:
    """A running single-node SLURM; ``env`` holds what its client commands need (``SLURM_CONF``)."""

    folder: Path
    conf: Path
    munged: int | None

    @property
    def env(self) -> dict[str, str]:
        return {"SLURM_CONF": str(self.conf)}

    def run(self, *command: str, **kwargs) -> subprocess.CompletedProcess:
        return subprocess.run(list(command), capture_output=True, text=True, timeout=60,
                              env={**os.environ, **self.env}, **kwargs)

    def jobs(self) -> dict[str, str]:
        """Job id -> state of every job the controller still knows."""
        out = self.run("squeue", "-h", "-t", "all", "-o", "%i %T").stdout
        return dict(line.split() for line in out.splitlines() if line.strip())

    def cancel_all(self) -> None:
        """Cancel every job and wait (up to 30 s) until none is left running."""
        live = [job for job, state in self.jobs().items() if state in ("PENDING", "RUNNING", "CONFIGURING")]
        if live:
            self.run("scancel", *live)
        deadline = time.monotonic() + 30
        while time.monotonic() < deadline and any(
                s in ("PENDING", "RUNNING", "CONFIGURING", "COMPLETING") for s in self.jobs().values()):
            time.sleep(0.2)

    def stop(self) -> None:
        """Cancel the jobs, then stop the daemons (and munged, if this node started it) by their pids."""
        try:
            self.cancel_all()
        finally:
            for pidfile in ("slurmd.pid", "slurmctld.pid"):
                _kill(self.folder / pidfile)
            if self.munged:
                _kill_pid(self.munged)
            shutil.rmtree(self.folder, ignore_errors=True)


def _kill_pid(pid: int) -> None:
    try:
        os.kill(pid, signal.SIGTERM)
    except ProcessLookupError:
        return
    for _ in range(100):
        try:
            os.kill(pid, 0)
        except ProcessLookupError:
            return
        time.sleep(0.05)
    os.kill(pid, signal.SIGKILL)


def _kill(pidfile: Path) -> None:
    try:
        _kill_pid(int(pidfile.read_text()))
    except (OSError, ValueError):
        pass


def start() -> SlurmNode:
    """Start munged (if none answers), slurmctld and slurmd; return once the node takes jobs."""
    folder = Path(tempfile.mkdtemp(prefix="climodes-slurm-"))
    folder.chmod(0o755)  # job logs and scripts under it are read by the job's processes
    (folder / "state").mkdir()
    (folder / "spool").mkdir()
    munged = _start_munge()
    conf = folder / "slurm.conf"
    conf.write_text(slurm_conf(folder))
    node = SlurmNode(folder, conf, munged)
    env = {**os.environ, **node.env}
    try:
        subprocess.run([_program("slurmctld"), "-f", str(conf)], check=True, env=env, timeout=60, capture_output=True)
        subprocess.run([_program("slurmd"), "-f", str(conf)], check=True, env=env, timeout=60, capture_output=True)
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline:
            if node.run("sinfo", "-h", "-o", "%T").stdout.strip() == "idle":
                return node
            time.sleep(0.2)
        log = (folder / "slurmctld.log").read_text()[-2000:] + (folder / "slurmd.log").read_text()[-2000:]
        raise RuntimeError(f"the SLURM node did not become idle within 60 s:\n{log}")
    except BaseException:
        node.stop()
        raise


if __name__ == "__main__":
    reason = why_not()
    if reason:
        raise SystemExit(reason)
    running = start()
    print(f"SLURM_CONF={running.conf}")
    try:
        input("running; Enter stops it ")
    finally:
        running.stop()
