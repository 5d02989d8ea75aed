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
from brimline.daemon.wire.recording import (
    RecordReader,
    RecordWriter,
    recording_epoch,
    recording_paths,
)
from brimline.drivers.sources.replay import ReplayDriver


def _plan():
    from brimline.drivers.link.frame import make_plan

    return make_plan(**loopback_config().link.model_dump())


def _record(path, max_bytes=None, **script):
    """Write a scripted source's estimates to a recording; return them."""
    drv = ScriptedDriver(_plan(), **script)
    with drv, RecordWriter(path, topics=[codec.TOPIC_ESTIMATE], max_bytes=max_bytes) as w:
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
        with ReplayDriver(path=path) as drv:
            got = list(drv.frames())
        assert len(got) == 9
        assert drv.counters["torn"] == 1

    def test_plays_every_file_of_a_rotated_recording_in_order(self, tmp_path):
        path = tmp_path / "est.brlog"
        original = _record(path, max_bytes=4096, frames=60)
        parts = recording_paths(path)
        assert len(parts) >= 5  # the defect played only the first of these
        with ReplayDriver(path=path) as drv:
            got = list(drv.frames())
        assert [e.frame for e in got] == [e.frame for e in original]
        assert [e.time_s for e in got] == [e.time_s for e in original]
        assert drv.counters["frames"] == 60 and drv.counters["torn"] == 0

    def test_loops_over_the_whole_rotated_set(self, tmp_path):
        path = tmp_path / "est.brlog"
        _record(path, max_bytes=4096, frames=20, frame_s=0.1)
        with ReplayDriver(path=path, loop=True) as drv:
            it = drv.frames()
            got = [next(it) for _ in range(50)]
        assert np.all(np.diff([e.frame for e in got]) == 1)
        assert np.allclose(np.diff([e.time_s for e in got]), 0.1)
        assert drv.counters["passes"] == 2

    def test_torn_tail_in_a_middle_part_is_counted_and_the_rest_plays(self, tmp_path):
        path = tmp_path / "est.brlog"
        _record(path, max_bytes=4096, frames=60)
        middle = recording_paths(path)[1]
        middle.write_bytes(middle.read_bytes()[:-11])
        with ReplayDriver(path=path) as drv:
            got = list(drv.frames())
        assert len(got) == 59 and drv.counters["torn"] == 1

    def test_a_missing_part_is_a_source_error(self, tmp_path):
        path = tmp_path / "est.brlog"
        _record(path, max_bytes=4096, frames=60)
        recording_paths(path)[2].unlink()
        with pytest.raises(SourceError, match=r"replay: .*part 2 \(est\.0002\.brlog\) is "
                                              r"missing"):
            ReplayDriver(path=path)

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


class _SlowStart(ReplayDriver):
    """A replay whose first estimate comes only after the service's clock moved 30 s, as on a
    machine too busy to run the driver thread for a while."""

    def __init__(self, clock, **kw):
        super().__init__(**kw)
        self._fake_clock = clock

    def frames(self):
        self._fake_clock.now_s += 30.0
        yield from super().frames()


class _Clock:
    def __init__(self):
        self.now_s = 100.0

    def __call__(self):
        self.now_s += 0.001
        return self.now_s


def test_a_slow_start_or_a_busy_machine_does_not_change_a_replay(tmp_path):
    """A replay runs on its estimates' own times: wall time passing before its first estimate
    (or between two) is no silent link, so no fallback map appears and the maps are those of
    an undisturbed replay."""
    recording = tmp_path / "est.brlog"
    _record(recording, frames=200, fades=[(1.0, 20, 70, 14.0)])
    runs = []
    for name, slow in (("a", False), ("b", True)):
        out = tmp_path / f"{name}.brlog"
        cfg = loopback_config(record={"path": str(out), "topics": ["map"]},
                              driver={"kind": "replay", "replay": {"path": str(recording)}})
        clock = _Clock()
        drv = (_SlowStart(clock, path=recording) if slow else ReplayDriver(path=recording))
        with Service(cfg, driver=drv, clock=clock) as svc:
            svc.run(60.0)
            assert svc.driver_state == "ended"
        with RecordReader(out) as r:
            runs.append([m for _, m in r])
    a, b = runs
    assert len(a) >= 2 and not any(m.fallback for m in a + b)
    assert [_bytes(m) for m in a] == [_bytes(m) for m in b]


def test_without_saved_state_replays_are_identical_epoch_included(tmp_path):
    """What the README promises for a replay with no ``service.state_path``: the same maps byte
    for byte, epoch id included (it names the recording)."""
    recording = tmp_path / "est.brlog"
    _record(recording, frames=300, fades=[(1.0, 20, 70, 14.0)], gaps=[(2.0, 2.8)])
    runs = []
    for name in ("a", "b"):
        out = tmp_path / f"{name}.brlog"
        cfg = loopback_config(record={"path": str(out), "topics": ["map"]},
                              driver={"kind": "replay", "replay": {"path": str(recording)}})
        with Service(cfg) as svc:
            svc.run(20.0)
            assert svc.driver_state == "ended"
        with RecordReader(out) as r:
            runs.append([m for _, m in r])
    a, b = runs
    assert len(a) >= 3 and len(a) == len(b)
    assert {m.epoch for m in a} == {recording_epoch(recording)}
    assert [_bytes(m) for m in a] == [_bytes(m) for m in b]


def _bytes(m):
    return b"".join(bytes(memoryview(f).cast("B")) for f in codec.encode(codec.TOPIC_MAP, m))
