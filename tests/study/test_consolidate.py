"""Consolidated frames: a finished trajectory's chunks merged into one ``frames.h5``
(docs/architecture.md#study-folder).  The reference in every check is the chunk layout the same
run leaves before consolidation (bitwise, np.array_equal); the crash checks interrupt the
consolidation before each of its file operations in turn.
"""

from __future__ import annotations

import os
import shutil

import numpy as np
import pytest
from test_checkpoint import K, assert_same_frames, driver, run_with_checkpoints

from mapdyn.study import checkpoint
from mapdyn.study.checkpoint import FRAMES_FILE, TrajectoryStore, consolidation_meta, read_h5

pytestmark = pytest.mark.filterwarnings("ignore:no coupling vectors:UserWarning")


def finished_chunks(folder, nsteps=60):
    """A trajectory run to its end with chunks only (7 chunks for 60 steps at K = 10)."""
    dyn, store = run_with_checkpoints(folder, nsteps)
    return dyn, store


def restart_arrays(store):
    point = store.restart_point()
    return point.state.step, point.chunks, point.state.positions.copy(), point.state.x.copy(), point.state.p.copy()


def test_consolidation_leaves_four_files_and_same_frames(tmp_path):
    _, ref = finished_chunks(tmp_path / "ref")
    shutil.copytree(ref.folder, tmp_path / "c")
    store = TrajectoryStore(tmp_path / "c")
    before = sorted(os.listdir(store.folder))
    assert len(before) == 2 + 7  # state, previous state, 7 chunks (no warnings.json at this level)
    assert store.consolidate()
    assert sorted(os.listdir(store.folder)) == [FRAMES_FILE, "state.h5", "state_previous.h5"]
    assert_same_frames(store.read_frames(), ref.read_frames())
    assert_same_frames(store.read_frames(3), ref.read_frames(3))  # a prefix of the merged chunks
    a, b = restart_arrays(store), restart_arrays(ref)
    assert a[:2] == b[:2] and all(np.array_equal(x, y) for x, y in zip(a[2:], b[2:]))
    meta = store.restart_point().meta
    assert meta["consolidated_chunks"] == meta["chunks"] == 7 and meta["frames_file"] == FRAMES_FILE
    assert read_h5(os.path.join(store.folder, FRAMES_FILE))[1]["chunk_nframes"][0] == 1  # chunk 0: the step-0 frame
    # both state files are the final state: either one alone is enough
    os.unlink(store.state_path)
    assert_same_frames(store.read_frames(), ref.read_frames())
    assert store.consolidate() and sorted(os.listdir(store.folder)) == [FRAMES_FILE, "state.h5", "state_previous.h5"]


def test_flipped_byte_in_consolidated_file_is_named(tmp_path):
    _, store = finished_chunks(tmp_path / "f")
    store.consolidate()
    path = os.path.join(store.folder, FRAMES_FILE)
    raw = bytearray(open(path, "rb").read())
    steps = read_h5(path)[0]["actions"]
    pos = bytes(raw).find(steps[3:5].tobytes())
    assert pos > 0
    raw[pos + 2] ^= 0x01
    with open(path, "wb") as fh:
        fh.write(bytes(raw))
    meta, problems = store.verified_meta(full=True)
    assert meta is None and len(problems) == 2 and all(FRAMES_FILE in p and "digest" in p for p in problems)
    point = store.restart_point()
    assert point.state is None and all(FRAMES_FILE in p for p in point.problems)


class Crash(Exception):
    pass


@pytest.mark.parametrize("extend", [False, True])
def test_kill_between_each_consolidation_step(tmp_path, monkeypatch, extend):
    """Interrupt before the n-th write or delete; the folder must read back and continue unchanged."""
    if extend:  # consolidated at 40 steps, extended to 60: frames.h5 itself is replaced
        _, ref = finished_chunks(tmp_path / "ref", 40)
        ref.consolidate()
        extend_to(ref, 60)
    else:
        _, ref = finished_chunks(tmp_path / "ref", 60)
    ref_frames, ref_state = ref.read_frames(), restart_arrays(ref)
    shutil.copytree(ref.folder, tmp_path / "count")
    calls = count_operations(monkeypatch, TrajectoryStore(tmp_path / "count"))
    assert calls >= 6
    for n in range(calls):
        folder = tmp_path / f"kill{n}"
        shutil.copytree(ref.folder, folder)
        store = TrajectoryStore(folder)
        with monkeypatch.context() as m:
            crash_at(m, n)
            with pytest.raises(Crash):
                store.consolidate()
        meta, problems = store.verified_meta(full=True)
        assert meta is not None and not problems, (n, problems)
        assert_same_frames(store.read_frames(), ref_frames)
        got = restart_arrays(store)
        assert got[:2] == ref_state[:2] and all(np.array_equal(x, y) for x, y in zip(got[2:], ref_state[2:]))
        assert store.consolidate()  # the next open completes it
        assert sorted(os.listdir(folder)) == [FRAMES_FILE, "state.h5", "state_previous.h5"], n
        assert_same_frames(store.read_frames(), ref_frames)


def count_operations(monkeypatch, store) -> int:
    seen = []
    with monkeypatch.context() as m:
        for name in ("write_h5", "_remove"):
            real = getattr(checkpoint, name)
            m.setattr(checkpoint, name, lambda *a, _real=real, **kw: (seen.append(1), _real(*a, **kw))[1])
        store.consolidate()
    return len(seen)


def crash_at(m, n: int) -> None:
    seen = []
    for name in ("write_h5", "_remove"):
        real = getattr(checkpoint, name)

        def wrapped(*a, _real=real, **kw):
            if len(seen) == n:
                raise Crash(n)
            seen.append(1)
            return _real(*a, **kw)
        m.setattr(checkpoint, name, wrapped)


def extend_to(store, nsteps):
    """Continue a finished trajectory as ``extend --duration`` does: new chunks after the consolidated file."""
    point = store.restart_point()
    store.adopt(point)
    dyn = driver(point.state)
    chunks, digests, merged = point.chunks, point.meta["chunk_sha256"], consolidation_meta(point.meta)
    while dyn.state.step < nsteps:
        dyn.run(min(K, nsteps - dyn.state.step))
        chunks, digests = store.commit(dyn.state, dyn.frames, chunks, merged, digests)
        dyn.frames.clear()
    return dyn


def test_extend_after_consolidation(tmp_path):
    _, ref = finished_chunks(tmp_path / "ref", 60)
    _, store = finished_chunks(tmp_path / "e", 40)
    assert store.consolidate()
    dyn = extend_to(store, 60)
    names = sorted(os.listdir(store.folder))
    assert names == [FRAMES_FILE, "frames_0005.h5", "frames_0006.h5", "state.h5", "state_previous.h5"]
    assert_same_frames(store.read_frames(), ref.read_frames())  # merged chunks 0-4 + chunks 5, 6
    assert np.array_equal(dyn.state.positions, ref.restart_point().state.positions)
    assert store.consolidate()
    assert sorted(os.listdir(store.folder)) == [FRAMES_FILE, "state.h5", "state_previous.h5"]
    assert_same_frames(store.read_frames(), ref.read_frames())
    assert store.restart_point().meta["consolidated_chunks"] == 7
