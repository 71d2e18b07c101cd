"""Checkpoint files: integrity checks, exact restart of one trajectory, fallback rules.

The trajectory runs through the on-the-fly driver on Tully's model 1 via the model adapter
(method sqc/square/symmetrized; and the overlap-only path, couplings withheld, sqc/triangle/
adjusted), whose backend is a pure function of (positions, guess) — so a restarted run must equal
an uninterrupted one bit for bit (np.array_equal, no tolerance).
"""

from __future__ import annotations

import os

import ase
import numpy as np
import pytest
from ase import units

from mapdyn.backends.model_adapter import ModelAdapterBackend
from mapdyn.core.options import MethodOptions
from mapdyn.core.sampling import trajectory_generator
from mapdyn.driver.dynamics import MappingDynamics
from mapdyn.files import atomic_write
from mapdyn.models.tully import tully_model
from mapdyn.study.checkpoint import CheckpointError, TrajectoryStore, read_h5, write_h5
from mapdyn.units import AMU_IN_ME

pytestmark = pytest.mark.filterwarnings("ignore:no coupling vectors:UserWarning")

P_ASE = AMU_IN_ME * units.AUT / units.Bohr
K = 10  # checkpoint interval (steps)


def driver(restart_state=None, couplings=True, options=MethodOptions(), seed=3, index=0):
    model = tully_model("tully1")
    backend = ModelAdapterBackend(model, with_couplings=couplings)
    rng = trajectory_generator(seed, index)
    x0 = -6.0 + 0.5 * rng.standard_normal()
    p0 = 15.0 + 0.5 * rng.standard_normal()
    a = ase.Atoms("H", positions=[[x0 * units.Bohr, 0, 0]], masses=[2000.0 / AMU_IN_ME])
    a.set_momenta([[p0 / P_ASE, 0, 0]])
    kw = dict(restart_state=restart_state) if restart_state is not None else dict(rng=rng)
    return MappingDynamics(a, backend, 4.0 * units.AUT, 0, options, **kw)


def run_with_checkpoints(folder, nsteps, couplings=True, options=MethodOptions(), stop_at=None):
    """Run to ``nsteps`` committing every K steps; resume from the store if it has a state."""
    store = TrajectoryStore(folder)
    point = store.restart_point()
    store.adopt(point)
    if point.state is None:
        dyn = driver(couplings=couplings, options=options)
        chunks, digests = store.commit(dyn.state, dyn.frames, 0, {}, [])
    else:
        dyn = driver(point.state, couplings=couplings, options=options)
        chunks, digests = point.chunks, point.meta["chunk_sha256"]
    dyn.frames.clear()
    end = nsteps if stop_at is None else stop_at
    while dyn.state.step < end:
        dyn.run(min(K, end - dyn.state.step))
        chunks, digests = store.commit(dyn.state, dyn.frames, chunks, {}, digests)
        dyn.frames.clear()
    return dyn, store


def assert_same_frames(a: dict, b: dict):
    assert set(a) == set(b)
    for k in a:
        assert np.array_equal(a[k], b[k], equal_nan=True), k


@pytest.mark.parametrize("couplings,options", [(True, MethodOptions()),
                                               (False, MethodOptions(window="triangle", zero_point="adjusted"))])
def test_restart_is_bitwise_equal_to_uninterrupted_run(tmp_path, couplings, options):
    full, full_store = run_with_checkpoints(tmp_path / "full", 120, couplings, options)
    run_with_checkpoints(tmp_path / "split", 120, couplings, options, stop_at=57)  # stops mid-interval
    part, part_store = run_with_checkpoints(tmp_path / "split", 120, couplings, options)
    assert part.state.step == full.state.step == 120
    for name in ("positions", "momenta", "x", "p"):
        assert np.array_equal(getattr(part.state, name), getattr(full.state, name)), name
    assert part.state.energy_reference == full.state.energy_reference
    assert np.array_equal(part.state.result.guess.eigenvectors, full.state.result.guess.eigenvectors)
    fa, fb = full_store.read_frames(), part_store.read_frames()
    assert fa["step"].tolist() == list(range(121))
    assert_same_frames(fa, fb)


def test_roundtrip_and_corruption_detection(tmp_path):
    path = tmp_path / "x.h5"
    data = {"a": np.arange(1000.0), "blob": b"hello" * 100, "s": np.float64(2.5)}
    write_h5(path, data, {"k": 1})
    arrays, meta = read_h5(path)
    assert meta == {"k": 1} and arrays["blob"] == data["blob"] and np.array_equal(arrays["a"], data["a"])
    raw = bytearray(path.read_bytes())
    # flip one byte inside the float array's data (locate it by its bytes)
    pos = bytes(raw).find(np.arange(1000.0)[500:502].tobytes())
    assert pos > 0
    raw[pos + 3] ^= 0xFF
    bad = tmp_path / "bad.h5"
    bad.write_bytes(bytes(raw))
    with pytest.raises(CheckpointError, match="bad.h5"):
        read_h5(bad)
    trunc = tmp_path / "trunc.h5"
    trunc.write_bytes(path.read_bytes()[: len(raw) // 2])
    with pytest.raises(CheckpointError, match="trunc.h5"):
        read_h5(trunc)


def test_atomic_write_leaves_old_file_on_failure(tmp_path):
    path = tmp_path / "f.h5"
    write_h5(path, {"a": np.ones(3)})

    def failing(tmp):
        with open(tmp, "w") as fh:
            fh.write("partial")
        raise RuntimeError("disk full")

    with pytest.raises(RuntimeError):
        atomic_write(path, failing)
    assert np.array_equal(read_h5(path)[0]["a"], np.ones(3))
    assert [p.name for p in tmp_path.iterdir()] == ["f.h5"]  # no temporary left behind


def test_truncated_state_falls_back_to_previous_then_start(tmp_path):
    full, _ = run_with_checkpoints(tmp_path / "ref", 60)
    dyn, store = run_with_checkpoints(tmp_path / "t", 60, stop_at=40)
    good = store.restart_point()
    assert good.state.step == 40 and good.chunks == 5 and not good.problems
    raw = open(store.state_path, "rb").read()
    with open(store.state_path, "wb") as fh:
        fh.write(raw[: len(raw) // 3])
    point = store.restart_point()
    assert point.state.step == 30 and point.chunks == 4
    assert len(point.problems) == 1 and "state.h5" in point.problems[0]
    # continuing from the fallback reproduces the uninterrupted run exactly
    again, store = run_with_checkpoints(tmp_path / "t", 60)
    assert np.array_equal(again.state.positions, full.state.positions)
    assert_same_frames(store.read_frames(), TrajectoryStore(tmp_path / "ref").read_frames())
    # both generations damaged → start from scratch
    for p in (store.state_path, store.previous_state_path):
        with open(p, "r+b") as fh:
            fh.truncate(100)
    point = store.restart_point()
    assert point.state is None and point.chunks == 0 and len(point.problems) == 2


def test_damaged_chunk_detected_and_state_not_used(tmp_path):
    _, store = run_with_checkpoints(tmp_path / "c", 50)
    last = store.restart_point()
    assert last.chunks == 6
    # damage the newest chunk: the newest state covers it, the previous one does not
    with open(store.chunk_path(5), "r+b") as fh:
        fh.truncate(os.path.getsize(store.chunk_path(5)) // 2)
    point = store.restart_point()
    assert point.state.step == 40 and point.chunks == 5
    assert any("frames_0005.h5" in p for p in point.problems)
    # damage an old chunk covered by both states: nothing usable, start again
    with open(store.chunk_path(2), "r+b") as fh:
        fh.truncate(50)
    point = store.restart_point()
    assert point.state is None and len(point.problems) == 2


def test_chunk_newer_than_state_is_ignored(tmp_path):
    ref, ref_store = run_with_checkpoints(tmp_path / "ref", 40)
    dyn, store = run_with_checkpoints(tmp_path / "n", 40, stop_at=20)
    # a chunk written just before a crash, never covered by a state (and with other content)
    write_h5(store.chunk_path(3), {"step": np.array([99, 100])}, {"chunk": 3})
    point = store.restart_point()
    assert point.chunks == 3 and point.state.step == 20 and not point.problems
    assert store.read_frames()["step"].max() == 20
    done, store = run_with_checkpoints(tmp_path / "n", 40)
    assert_same_frames(store.read_frames(), ref_store.read_frames())


def test_state_records_chunk_digests(tmp_path):
    _, store = run_with_checkpoints(tmp_path / "d", 20)
    # replacing a covered chunk by another valid file with different content is caught
    arrays, meta = read_h5(store.chunk_path(1))
    arrays["time_au"] = arrays["time_au"] + 1.0
    write_h5(store.chunk_path(1), arrays, meta)
    point = store.restart_point()
    assert point.state is None or point.chunks <= 1
    assert any("digest" in p for p in point.problems)


def test_older_object_without_a_later_defaulted_field_still_decodes():
    """A field added later with a default (TDDFTGuess.gap_Eh, DriverState.end_event) may be missing
    from a file written before it existed; a missing required field is still refused."""
    import json

    from mapdyn.backends.pyscf.tddft import TDDFTGuess
    from mapdyn.study.objects import ObjectFormatError, decode_object, encode_object

    guess = TDDFTGuess(np.zeros((2, 3)), np.eye(2), 1, np.zeros((1, 1, 1)), ("H", "H"), gap_Eh=0.3)
    arrays = encode_object(guess, "g")
    tree = json.loads(arrays["g.tree"].decode())
    del tree["root"]["f"]["gap_Eh"]
    old = dict(arrays, **{"g.tree": json.dumps(tree).encode()})
    back = decode_object(old, "g")
    assert back.gap_Eh is None and back.nocc == 1
    del tree["root"]["f"]["nocc"]
    with pytest.raises(ObjectFormatError, match="fields"):
        decode_object(dict(arrays, **{"g.tree": json.dumps(tree).encode()}), "g")
