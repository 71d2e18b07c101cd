"""Progress bars stay quiet when the output is not a terminal; the closed-pipe case exits cleanly."""

import io
import os
import subprocess
import sys

from conftest import ENV, REPO


def test_progress_bars_write_nothing_off_a_terminal():
    from mapdyn.progress import EnsembleBar, iterate
    from mapdyn.study.runner import Progress

    buf = io.StringIO()            # not a terminal: tqdm(disable=None) turns itself off
    bar = EnsembleBar(file=buf)
    bar(Progress(1, 0, 4, 10, 40, 5.0, 6.0, 2.0))
    bar.close()
    assert list(iterate(range(3), "x", file=buf)) == [0, 1, 2]
    assert buf.getvalue() == ""


def test_closed_pipe_gives_no_traceback(tmp_path):
    # `mapdyn status --json | head` after head has left: stdout is a pipe whose read end is already
    # closed, so writing the (> 8 kB, unbuffered past the pipe buffer) status fails with EPIPE every time
    from conftest import tully1_study

    from mapdyn.study.notebook import create_study

    study = create_study(tully1_study(name="pipe", trajectories=300, engine="on_the_fly", batch=None), tmp_path / "s")
    r, w = os.pipe()
    os.close(r)
    try:
        proc = subprocess.run([sys.executable, "-m", "mapdyn", "status", study.folder, "--json"], stdout=w,
                              stderr=subprocess.PIPE, cwd=REPO, env=ENV, text=True, timeout=120)
    finally:
        os.close(w)
    assert "Traceback" not in proc.stderr and "BrokenPipeError" not in proc.stderr, proc.stderr
    assert proc.returncode == 141
