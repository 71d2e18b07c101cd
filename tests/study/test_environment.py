"""Environment faults and process faults: each test names the fault it injects and checks a one-line
error with exit 2 (environment) or 1 (internal), or that nothing is lost (bitwise equal results
after the repair; the model engine is deterministic, so any difference is a bug)."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time

import numpy as np
import pytest
from conftest import ENV, tully1_study, write

from mapdyn.cli import main
from mapdyn.study.checkpoint import read_h5
from mapdyn.study.folder import Study

QUIET = ["--quiet", "--workers", "1", "--no-analysis"]


def one_line(capsys, code, expected=2):
    err = capsys.readouterr().err.strip().splitlines()
    assert code == expected, err
    assert len(err) >= 1 and err[-1].startswith("mapdyn: error: "), err
    return err[-1]


def chunk_data(folder):
    study = Study(folder)
    return {c: [read_h5(p)[0] for p, _ in study.chunk_segments(c)] for c, _, _ in study.chunks()}


def assert_same_chunks(a, b):
    assert a.keys() == b.keys()
    for c in a:
        assert len(a[c]) == len(b[c]) == 1
        for k in a[c][0]:
            assert np.array_equal(a[c][0][k], b[c][0][k], equal_nan=True), (c, k)


@pytest.fixture
def tmpfs(tmp_path):
    """A small tmpfs mounted at tmp_path/fs (root only); skipped where mounting is not allowed."""
    mnt = tmp_path / "fs"
    mnt.mkdir()

    def mount(options):
        r = subprocess.run(["mount", "-t", "tmpfs", "-o", options, "tmpfs", str(mnt)], capture_output=True)
        if r.returncode != 0:
            pytest.skip(f"cannot mount a tmpfs here ({r.stderr.decode().strip() or 'mount failed'})")
        return mnt

    yield mount
    subprocess.run(["umount", str(mnt)], capture_output=True)


def test_output_path_is_a_file(tmp_path, capsys):
    """Fault: --output names an existing file, or a folder below a file."""
    toml = write(tmp_path, "m.toml", tully1_study(trajectories=4, analysis=False))
    blocker = tmp_path / "blocker"
    blocker.write_text("x")
    assert "is a file" in one_line(capsys, main(["run", toml, "--output", str(blocker), *QUIET]))
    assert "is a file" in one_line(capsys, main(["run", toml, "--output", str(blocker / "sub"), *QUIET]))
    assert blocker.read_text() == "x"


def test_read_only_file_system(tmp_path, capsys, tmpfs):
    """Fault: the output's file system is mounted read-only (unwritable even for root)."""
    mnt = tmpfs("size=1m,ro")
    toml = write(tmp_path, "m.toml", tully1_study(trajectories=4, analysis=False))
    line = one_line(capsys, main(["run", toml, "--output", str(mnt / "study"), *QUIET]))
    assert "no write permission" in line or "Read-only" in line


def test_full_disk_names_path_and_free_space_and_resume_loses_nothing(tmp_path, capsys, tmpfs):
    """Fault: the disk fills up during the run (150 kB tmpfs; each chunk file is ~53 kB).  One line
    naming the path and the free space, exit 2; after space is freed, resume completes and the
    result equals an uninterrupted run bitwise."""
    mnt = tmpfs("size=150k")
    toml = write(tmp_path, "m.toml", tully1_study(trajectories=40, batch=10, duration="200 au", analysis=False))
    ref = tmp_path / "ref"
    assert main(["run", toml, "--output", str(ref), *QUIET]) == 0
    capsys.readouterr()
    folder = mnt / "study"
    line = one_line(capsys, main(["run", toml, "--output", str(folder), *QUIET]))
    assert "no space left" in line and "free:" in line and str(mnt) in line, line
    assert not [n for n in os.listdir(folder / "chunks") if n.endswith(".tmp")]
    r = subprocess.run(["mount", "-o", "remount,size=4m", str(mnt)], capture_output=True)
    assert r.returncode == 0, r.stderr
    assert main(["resume", str(folder), *QUIET]) == 0
    assert_same_chunks(chunk_data(folder), chunk_data(ref))


def test_internal_error_is_one_line_exit_1(tmp_path, capsys, monkeypatch):
    """Fault: a bug inside a command (simulated): one line, exit 1, traceback only on request."""
    import mapdyn.cli as cli

    def boom(args):
        raise RuntimeError("simulated bug\nsecond line")

    monkeypatch.setattr(cli, "_cmd_status", boom)
    line = one_line(capsys, main(["status", str(tmp_path)]), expected=1)
    assert "internal error (RuntimeError: simulated bug)" in line


def _children(pid):
    out = []
    for d in os.listdir("/proc"):
        if d.isdigit():
            try:
                with open(f"/proc/{d}/stat") as fh:
                    fields = fh.read().rsplit(")", 1)[1].split()
                if int(fields[1]) == pid and fields[0] not in "ZX":
                    out.append(int(d))
            except (OSError, IndexError, ValueError):
                pass
    return out


def _cmdline(pid):
    try:
        with open(f"/proc/{pid}/cmdline", "rb") as fh:
            return fh.read().decode(errors="replace")
    except OSError:
        return ""


def _alive(pid):
    try:
        with open(f"/proc/{pid}/stat") as fh:
            return fh.read().rsplit(")", 1)[1].split()[0] not in "ZX"
    except OSError:
        return False


def test_parent_sigkill_takes_workers_down_and_second_writer_is_refused(tmp_path):
    """Faults: a second ``resume`` while a run holds the folder (refused, exit 2, naming the pid);
    then SIGKILL of the parent process only: every worker is gone within 5 s, the lock is free
    (no stale lock) and resume finishes the study."""
    toml = write(tmp_path, "m.toml", tully1_study(trajectories=400, batch=10, duration="20000 au", workers=2,
                                                  analysis=False))
    folder = tmp_path / "study"
    proc = subprocess.Popen([sys.executable, "-m", "mapdyn", "run", toml, "--output", str(folder), "--no-analysis",
                             "--quiet"], cwd=tmp_path, env=ENV, start_new_session=True,
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    try:
        t0 = time.time()
        workers = []
        while time.time() - t0 < 120 and len(workers) < 2:
            time.sleep(0.2)
            workers = [c for c in _children(proc.pid) if "spawn_main" in _cmdline(c)]
            assert proc.poll() is None, "the run ended before the test could interfere"
        assert len(workers) == 2, workers
        workers = _children(proc.pid)  # the two workers and multiprocessing's resource tracker
        second = subprocess.run([sys.executable, "-m", "mapdyn", "resume", str(folder), "--no-analysis"],
                                cwd=tmp_path, env=ENV, capture_output=True, text=True, timeout=120)
        assert second.returncode == 2 and f"in use by pid {proc.pid}" in second.stderr, second.stderr
        os.kill(proc.pid, signal.SIGKILL)  # the parent only
        proc.wait()
        t_kill = time.time()
        while time.time() - t_kill < 5 and any(_alive(w) for w in workers):
            time.sleep(0.05)
        gone_after = time.time() - t_kill
        assert not any(_alive(w) for w in workers), f"workers alive {gone_after:.1f} s after the parent died"
        print(f"workers gone {gone_after:.2f} s after SIGKILL of the parent")
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)
    status = Study(folder).status()
    assert status.counts()["running"] == 0 and not status.complete
    r = subprocess.run([sys.executable, "-m", "mapdyn", "extend", str(folder), "--trajectories", "400",
                        "--no-run"], cwd=tmp_path, env=ENV, capture_output=True, text=True)
    assert r.returncode == 0, r.stderr  # the dead holder left no stale lock
