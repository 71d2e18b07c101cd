"""A throw-away single-node SLURM cluster (munged + slurmctld + slurmd on 127.0.0.1) for the tests.

Everything lives in one folder: its own munge key and socket, slurm.conf, state, spool, logs and
pid files, and free TCP ports picked at start, so it neither needs nor touches /etc/slurm, the
system's munge socket or another cluster on the same machine.  Client commands (sbatch, squeue,
scancel) find it through the ``SLURM_CONF`` variable of :attr:`LocalSlurm.env`.

Needs Debian's ``slurm-wlm`` and ``munge`` packages and root (slurmd runs jobs as any user);
:func:`unavailable_reason` says in one line why a cluster cannot be started here.

Command line (for trying it by hand)::

    python tests/cluster/local_slurm.py start DIR      # prints: export SLURM_CONF=DIR/slurm.conf
    python tests/cluster/local_slurm.py stop DIR
"""

from __future__ import annotations

import os
import shutil
import signal
import socket
import subprocess
import sys
import time

DAEMONS = ("munged", "slurmctld", "slurmd")
CLIENTS = ("sbatch", "squeue", "scancel", "sinfo")
NODE = "localhost"
CPUS = 2


def _which(name: str) -> str | None:
    return shutil.which(name) or next((p for d in ("/usr/sbin", "/usr/bin") if os.path.exists(p := f"{d}/{name}")), None)


def unavailable_reason() -> str | None:
    """None when the daemons and clients are installed and we are root, else why not (one line)."""
    missing = [n for n in DAEMONS + CLIENTS if _which(n) is None]
    if missing:
        return (f"SLURM test cluster unavailable: {', '.join(missing)} not installed "
                f"(Debian packages slurm-wlm and munge; .ci/run installs them with apt-get)")
    if os.geteuid() != 0:
        return "SLURM test cluster unavailable: slurmd and munged must be started as root"
    return None


def _free_ports(n: int) -> list[int]:
    socks = []
    try:
        for _ in range(n):
            s = socket.socket()
            s.bind(("127.0.0.1", 0))
            socks.append(s)
        return [s.getsockname()[1] for s in socks]
    finally:
        for s in socks:
            s.close()


def _memory_mb() -> int:
    with open("/proc/meminfo") as fh:
        for line in fh:
            if line.startswith("MemTotal:"):
                return int(line.split()[1]) // 1024
    return 4096


class LocalSlurm:
    """The cluster in ``folder``; :meth:`start` it, run jobs with :attr:`env`, :meth:`stop` it."""

    def __init__(self, folder: str):
        self.folder = os.path.abspath(folder)
        self.conf = os.path.join(self.folder, "slurm.conf")
        self.socket = os.path.join(self.folder, "munge", "munge.socket")
        self.env = dict(os.environ, SLURM_CONF=self.conf)

    def path(self, *parts: str) -> str:
        return os.path.join(self.folder, *parts)

    # ------------------------------------------------------------------ files
    def _write_files(self) -> None:
        for sub in ("munge", "state", "spool", "log"):
            os.makedirs(self.path(sub), mode=0o700, exist_ok=True)
        os.chmod(self.folder, 0o755)
        key = self.path("munge", "munge.key")
        with open(key, "wb") as fh:
            fh.write(os.urandom(128))
        os.chmod(key, 0o600)
        ctl, node = _free_ports(2)
        memory = max(1024, int(_memory_mb() * 0.8))
        text = f"""\
ClusterName=mapdyntest
SlurmctldHost={NODE}(127.0.0.1)
SlurmUser=root
SlurmdUser=root
SlurmctldPort={ctl}
SlurmdPort={node}
AuthType=auth/munge
CredType=cred/munge
AuthInfo=socket={self.socket}
StateSaveLocation={self.path('state')}
SlurmdSpoolDir={self.path('spool')}
SlurmctldPidFile={self.path('slurmctld.pid')}
SlurmdPidFile={self.path('slurmd.pid')}
SlurmctldLogFile={self.path('log', 'slurmctld.log')}
SlurmdLogFile={self.path('log', 'slurmd.log')}
ProctrackType=proctrack/linuxproc
TaskPlugin=task/none
JobAcctGatherType=jobacct_gather/none
AccountingStorageType=accounting_storage/none
JobCompType=jobcomp/none
MpiDefault=none
SchedulerType=sched/backfill
SchedulerParameters=bf_interval=1
SelectType=select/cons_tres
SelectTypeParameters=CR_Core
ReturnToService=2
SlurmctldTimeout=30
SlurmdTimeout=30
KillWait=5
NodeName={NODE} NodeAddr=127.0.0.1 CPUs={CPUS} RealMemory={memory} State=UNKNOWN
PartitionName=debug Nodes={NODE} Default=YES MaxTime=INFINITE State=UP
"""
        with open(self.conf, "w") as fh:
            fh.write(text)

    # ------------------------------------------------------------------ daemons
    def _run(self, args: list[str], timeout: float = 30) -> subprocess.CompletedProcess:
        return subprocess.run(args, env=self.env, capture_output=True, text=True, timeout=timeout)

    def _log_tail(self, name: str) -> str:
        try:
            with open(self.path("log", f"{name}.log")) as fh:
                lines = [ln.strip() for ln in fh if ln.strip()]
            return lines[-1] if lines else "(empty log)"
        except OSError:
            return "(no log)"

    def start(self, timeout: float = 60) -> None:
        """Start munged, slurmctld and slurmd; wait until the node is idle.  RuntimeError (one line) if not."""
        reason = unavailable_reason()
        if reason:
            raise RuntimeError(reason)
        self._write_files()
        steps = [
            ("munged", [_which("munged"), "--force", f"--socket={self.socket}",
                        f"--key-file={self.path('munge', 'munge.key')}", f"--pid-file={self.path('munged.pid')}",
                        f"--log-file={self.path('log', 'munged.log')}", f"--seed-file={self.path('munge', 'seed')}"]),
            ("slurmctld", [_which("slurmctld"), "-f", self.conf, "-i"]),
            ("slurmd", [_which("slurmd"), "-f", self.conf, "-N", NODE]),
        ]
        for name, cmd in steps:
            proc = self._run(cmd)
            if proc.returncode != 0:
                self.stop()
                msg = (proc.stderr.strip().splitlines() or [self._log_tail(name)])[-1]
                raise RuntimeError(f"{name} did not start: {msg}")
        deadline = time.time() + timeout
        state = ""
        while time.time() < deadline:
            proc = self._run([_which("sinfo"), "-h", "-N", "-o", "%T"], timeout=10)
            state = proc.stdout.strip() or proc.stderr.strip()
            if proc.returncode == 0 and state.startswith("idle"):
                return
            time.sleep(0.5)
        self.stop()
        raise RuntimeError(f"SLURM node not idle within {timeout:g} s (sinfo: {state!r}; "
                           f"slurmd log: {self._log_tail('slurmd')})")

    def pids(self) -> dict[str, int]:
        """Process ids of the daemons that are running now, by name."""
        out = {}
        for name in DAEMONS:
            try:
                with open(self.path(f"{name}.pid")) as fh:
                    pid = int(fh.read().strip())
                with open(f"/proc/{pid}/stat") as fh:  # a stopped daemon may linger as a zombie
                    if fh.read().rsplit(")", 1)[1].split()[0] in ("Z", "X"):
                        continue
            except (OSError, ValueError, IndexError):
                continue
            out[name] = pid
        return out

    def stop(self, timeout: float = 30) -> bool:
        """Cancel every job, stop the daemons (slurmd, slurmctld, munged); True if all are gone."""
        if "slurmctld" in self.pids():
            self._run([_which("scancel"), "--full", "-p", "debug"], timeout=10)
        for name in ("slurmd", "slurmctld", "munged"):
            pid = self.pids().get(name)
            if pid is None:
                continue
            os.kill(pid, signal.SIGTERM)
            deadline = time.time() + timeout
            while time.time() < deadline and name in self.pids():
                time.sleep(0.2)
            if name in self.pids():
                os.kill(pid, signal.SIGKILL)
                time.sleep(0.5)
        return not self.pids()

    # ------------------------------------------------------------------ queries
    def squeue(self) -> list[tuple[str, str]]:
        """(job id, state) of every job in the queue."""
        proc = self._run([_which("squeue"), "-h", "-o", "%i %T"], timeout=10)
        return [tuple(line.split()[:2]) for line in proc.stdout.splitlines() if line.strip()]  # type: ignore[misc]


if __name__ == "__main__":  # pragma: no cover - manual use
    action, folder = sys.argv[1], sys.argv[2]
    cluster = LocalSlurm(folder)
    if action == "start":
        cluster.start()
        print(f"export SLURM_CONF={cluster.conf}")
    else:
        print("stopped" if cluster.stop() else f"still running: {cluster.pids()}")
