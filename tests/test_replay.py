"""Replay of estimate recordings: recorded times, pacing, looping, torn tails, determinism."""

from __future__ import annotations

import shutil
import threading

import numpy as np
import pytest
from _service_fakes import ScriptedDriver, loopback_config

from brimline.daemon.errors import SourceError
from brimline.daemon.runtime.service import Service
from brimline.daemon.wire import codec
from brimline.daemon.wire.recording import RecordReader, RecordWriter
from brimline.drivers.sources.replay import ReplayDriver


def _plan():
    from brimline.drivers.link.frame import make_plan

    return make_plan(**loopback_config().link.model_dump())


def _record(path, **script):
    """Write a scripted source's estimates to a recording; return them."""
    drv = ScriptedDriver(_plan(), **script)
    with drv, RecordWriter(path, topics=[codec.TOPIC_ESTIMATE]) as w:
        estimates = list(drv.frames())
        for e in estimates:
            w.write(codec.TOPIC_ESTIMATE, e)
    return estimates


class TestReplayDriver:
    def test_yields_recorded_estimates_with_their_times(self, tmp_path):
        path = tmp_path / "est.brlog"
        original = _record(path, frames=30)
        with ReplayDriver(path=path) as drv:
            got = list(drv.frames())
        assert [e.time_s for e in got] == [e.time_s for e in original]
        assert [e.frame for e in got] == [e.frame for e in original]
        assert all(np.array_equal(a.snr_db, b.snr_db) for a, b in zip(got, original))
        assert drv.counters["frames"] == 30

    def test_torn_tail_is_counted_not_raised(self, tmp_path):
        path = tmp_path / "est.brlog"
        _record(path, frames=10)
        data = path.read_bytes()
        path.write_bytes(data[:-7])  # the recorder died in the middle of the last record
        with pytest.warns(UserWarning), ReplayDriver(path=path) as drv:
            got = list(drv.frames())
        assert len(got) == 9
        assert drv.counters["torn"] == 1

    def test_realtime_paces_by_recorded_time(self, tmp_path):
        path = tmp_path / "est.brlog"
        _record(path, frames=11, frame_s=0.1)  # 1.0 s of source time
        now = [0.0]
        slept = []

        def sleep(s):
            slept.append(s)
            now[0] += s

        with ReplayDriver(path=path, realtime=True, speed=2.0, sleep=sleep,
                          clock=lambda: now[0]) as drv:
            list(drv.frames())
        assert sum(slept) == pytest.approx(0.5)  # 1.0 s of recording at twice the speed

    def test_loop_keeps_time_and_frames_increasing(self, tmp_path):
        path = tmp_path / "est.brlog"
        _record(path, frames=5, frame_s=0.1)
        with ReplayDriver(path=path, loop=True) as drv:
            it = drv.frames()
            got = [next(it) for _ in range(12)]
        times = [e.time_s for e in got]
        frames = [e.frame for e in got]
        assert np.allclose(np.diff(times), 0.1)
        assert np.all(np.diff(frames) == 1)

    def test_missing_or_foreign_file_is_a_source_error(self, tmp_path):
        with pytest.raises(SourceError, match="no such recording"):
            ReplayDriver(path=tmp_path / "nope.brlog")
        junk = tmp_path / "junk.brlog"
        junk.write_bytes(b"not a recording at all")
        with pytest.raises(SourceError, match="bad magic"):
            ReplayDriver(path=junk)

    def test_close_stops_a_paced_replay(self, tmp_path):
        """close() from another thread wakes a replay that waits for its next frame: with an
        hour between recorded frames, only the wake-up can end the wait within the (generous,
        hang-catching) join timeout."""
        path = tmp_path / "est.brlog"
        _record(path, frames=3, frame_s=3600.0)
        drv = ReplayDriver(path=path, realtime=True)
        got, first = [], threading.Event()

        def consume():
            for est in drv.frames():
                got.append(est)
                first.set()

        worker = threading.Thread(target=consume, daemon=True)
        worker.start()
        assert first.wait(60)
        drv.close()
        worker.join(60)
        assert not worker.is_alive() and len(got) == 1


def _replay_maps(workdir, recording, state_seed):
    """Run the service over a replay; return the raw recorded map messages."""
    workdir.mkdir()
    shutil.copy(state_seed, workdir / "state.bin")
    cfg = loopback_config(
        workdir, record={"path": str(workdir / "out.brlog"), "topics": ["map"]},
        driver={"kind": "replay", "replay": {"path": str(recording)}})
    with Service(cfg) as svc:
        svc.run(20.0)
        assert svc.driver_state == "ended"
    with RecordReader(workdir / "out.brlog") as r:
        return [b"".join(bytes(f) for f in frames) for frames in r.frames()]


def test_replaying_twice_gives_the_same_maps_byte_for_byte(tmp_path):
    """The decision path is a function of the estimates alone (their time_s is the core's
    clock for replay), so two replays from the same saved state publish identical bytes."""
    recording = tmp_path / "est.brlog"
    _record(recording, frames=400, fades=[(1.0, 20, 70, 14.0), (2.5, 100, 140, 8.0)],
            gaps=[(3.0, 3.8)])
    seed_dir = tmp_path / "seed"
    cfg = loopback_config(seed_dir)
    seed_dir.mkdir()
    with Service(cfg, driver=ScriptedDriver(_plan(), frames=20)) as svc:
        svc.run(5.0)
    a = _replay_maps(tmp_path / "a", recording, seed_dir / "state.bin")
    b = _replay_maps(tmp_path / "b", recording, seed_dir / "state.bin")
    kinds = []
    for raw in a:
        assert raw  # non-empty messages
    with RecordReader(tmp_path / "a" / "out.brlog") as r:
        kinds = [m.reason for _, m in r]
    assert len(a) >= 4 and any("safe map" in k for k in kinds)
    assert a == b
