"""The daemon loop on real loopback sockets: maps, snapshots, state, fallback, failures.

Every socket binds 127.0.0.1 on a port the system picks (port 0); every wait is a poll with a
deadline. The estimate source is a scripted fake (tests/_service_fakes.py), so each test knows
exactly which frames the service saw.
"""

from __future__ import annotations

import json
import logging
import os
import subprocess
import sys
import threading
import time

import numpy as np
import pytest
import zmq
from _service_fakes import ReloadEveryTime, ScriptedDriver, loopback_config

from brimline.daemon.errors import RecordingError
from brimline.daemon.net.follower import Follower
from brimline.daemon.records import FrameOutcome, LoadMap
from brimline.daemon.runtime.service import Service
from brimline.daemon.runtime.status import band_columns, build_status, frame_fields
from brimline.daemon.wire import codec
from brimline.daemon.wire.recording import RecordReader
from brimline.daemon.wire.state import StateStore


def _follower(svc: Service, adopted: list | None = None) -> Follower:
    """A follower built from the config the one way (Follower.for_daemon), at the endpoints the
    service actually bound."""
    return Follower.for_daemon(svc.config.publish, svc.config.loading, plan=svc.plan,
                               map_endpoint=svc.endpoints["maps"],
                               snapshot_endpoint=svc.endpoints["snapshots"],
                               ack_endpoint=svc.endpoints["acks"],
                               on_map=None if adopted is None else adopted.append)


def _pump(svc: Service, followers=(), *, until, timeout_s: float = 10.0) -> bool:
    """Step the service and poll followers until ``until()`` or the deadline (which only
    catches a hang: tests assert order, counts and content, never how fast)."""
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        if until():
            return True
        svc.step(0.005)
        for f in followers:
            f.poll(0)
    return until()


def _drained(svc: Service) -> bool:
    return svc.driver_state in ("ended", "failed") and not svc._pending()


def _connected(svc: Service, follower: Follower) -> bool:
    return _pump(svc, [follower], until=lambda: follower.last_heartbeat is not None
                 and follower.synced)


class TestMapsAndSnapshots:
    def test_late_joiner_gets_the_current_map(self):
        """(How fast is a benchmark figure: late_join_ms in tests/bench/bench_protocol.py.)"""
        cfg = loopback_config()
        with Service(cfg, driver=ScriptedDriver(_plan(cfg), frames=120)) as svc:
            assert _pump(svc, until=lambda: _drained(svc))
            assert svc.current_map is not None
            with _follower(svc) as late:
                assert _pump(svc, [late], until=lambda: late.current is not None)
                assert late.current.seq == svc.current_map.seq
                assert np.array_equal(late.current.bits, svc.current_map.bits)

    def test_maps_follow_a_fade_and_reach_a_follower(self):
        """A 15 dB fade of 40 tones must lower the bits there (loading with an SNR gap puts
        fewer bits where SNR is lower: b = log2(1 + SNR/gap), the gap approximation)."""
        cfg = loopback_config()
        gate = threading.Event()
        drv = ScriptedDriver(_plan(cfg), frames=200, fades=[(1.0, 20, 59, 15.0)], gate=gate)
        adopted: list[LoadMap] = []
        with Service(cfg, driver=drv) as svc, _follower(svc, adopted) as f:
            assert _connected(svc, f)
            gate.set()
            assert _pump(svc, [f], until=lambda: _drained(svc))
            _pump(svc, [f], until=lambda: f.current is not None
                  and f.current.seq == svc.current_map.seq)
            assert f.current.seq == svc.current_map.seq
            before, after = adopted[0], f.current
            assert after.bits[20:60].mean() < before.bits[20:60].mean() - 2
            assert after.effective_frame > before.effective_frame
            seqs = [m.seq for m in adopted]
            assert seqs == sorted(set(seqs))


class TestRestart:
    def test_sequence_numbers_increase_across_a_restart(self, tmp_path):
        cfg = loopback_config(tmp_path)
        plan = _plan(cfg)
        with Service(cfg, driver=ScriptedDriver(plan, frames=150,
                                                fades=[(0.8, 10, 40, 12.0)])) as first:
            assert _pump(first, until=lambda: _drained(first))
            epoch, last_seq = first.epoch, first.current_map.seq
        saved = StateStore(cfg.service.state_path).load()
        assert saved.epoch == epoch and saved.seq == last_seq

        gate = threading.Event()
        drv = ScriptedDriver(plan, frames=150, fades=[(0.5, 60, 90, 12.0)], t0_s=10.0,
                             frame0=1000, gate=gate)
        with Service(cfg, driver=drv) as second:
            assert second.epoch == epoch
            assert second.current_map is not None and second.current_map.seq == last_seq
            with _follower(second) as f:  # the restored map is served to late joiners
                assert _pump(second, [f], until=lambda: f.current is not None)
                assert f.current.seq == last_seq
            gate.set()
            assert _pump(second, until=lambda: _drained(second))
            new = [c.seq for c in second.controller.changes]
        assert new and new[0] > last_seq and new == sorted(set(new))


# A daemon process that makes a map per estimate and whose state writer stalls after its first
# save (as if fsync hung): it prints its endpoints, waits for a line on stdin, then runs until
# killed. Only the seq lease stands between it and a reused seq after the kill.
_CRASHING_DAEMON = r"""
import json, sys, threading
from pathlib import Path
sys.path.insert(0, sys.argv[1])
from _service_fakes import ReloadEveryTime, ScriptedDriver, loopback_config
from brimline.daemon.runtime.service import Service
from brimline.drivers.link.frame import make_plan
cfg = loopback_config(Path(sys.argv[2]))
gate = threading.Event()
svc = Service(cfg, driver=ScriptedDriver(make_plan(**cfg.link.model_dump()),
                                         frames=1_000_000, gate=gate))
svc.start()
svc.controller.change = ReloadEveryTime(svc.loader)
svc._io.state.min_interval_s = 3600.0  # the lazy map save stalls after its first save
print(json.dumps({"epoch": svc.epoch, **svc.endpoints}), flush=True)
threading.Thread(target=lambda: (sys.stdin.readline(), gate.set()), daemon=True).start()
svc.run()
"""


def _map_sub(ctx, endpoint):
    sub = ctx.socket(zmq.SUB)
    sub.setsockopt(zmq.LINGER, 0)
    sub.setsockopt(zmq.SUBSCRIBE, codec.TOPIC_MAP.encode())
    sub.setsockopt(zmq.SUBSCRIBE, codec.TOPIC_HEARTBEAT.encode())
    sub.connect(endpoint)
    return sub


def _drain(sub, seen: list, timeout_ms: int = 0) -> None:
    while sub.poll(timeout_ms):
        topic, rec = codec.decode(sub.recv_multipart())
        seen.append((topic, rec))
        timeout_ms = 0


class TestCrash:
    def test_kill_9_then_restart_never_reuses_a_seq(self, tmp_path):
        """SIGKILL a daemon that published ~700 maps while its saved map lagged far behind;
        the restart's maps (same epoch) are numbered above every map seen before the kill."""
        here = os.path.dirname(os.path.abspath(__file__))
        proc = subprocess.Popen([sys.executable, "-c", _CRASHING_DAEMON, here, str(tmp_path)],
                                stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True)
        ctx = zmq.Context()
        before, after = [], []
        try:
            info = json.loads(proc.stdout.readline())
            sub = _map_sub(ctx, info["maps"])
            deadline = time.monotonic() + 10
            while not any(t == "heartbeat" for t, _ in before):  # subscribed
                assert time.monotonic() < deadline, "no heartbeat from the daemon"
                _drain(sub, before, 50)
            proc.stdin.write("go\n")
            proc.stdin.flush()
            while not any(t == "map" and r.seq >= 700 for t, r in before):
                assert time.monotonic() < deadline + 20, "too few maps"
                _drain(sub, before, 50)
            proc.kill()  # SIGKILL: no shutdown, no final save
            assert proc.wait(10) == -9
            sub.close()
        finally:
            if proc.poll() is None:
                proc.kill()
                proc.wait(5)
            proc.stdout.close()
            proc.stdin.close()
        old = [r.seq for t, r in before if t == "map"]
        saved = StateStore(tmp_path / "state.bin").load()
        assert saved.epoch == info["epoch"]
        assert saved.seq <= max(old)  # the saved map may lag what was sent by up to a lease

        cfg = loopback_config(tmp_path)
        gate = threading.Event()
        try:
            with Service(cfg, driver=ScriptedDriver(_plan(cfg), frames=30, gate=gate)) as svc:
                svc.controller.change = ReloadEveryTime(svc.loader)
                sub = _map_sub(ctx, svc.endpoints["maps"])
                assert _pump(svc, until=lambda: (_drain(sub, after), any(
                    t == "heartbeat" for t, _ in after))[1], timeout_s=5.0)
                gate.set()
                assert _pump(svc, until=lambda: _drained(svc))
                _pump(svc, until=lambda: (_drain(sub, after), False)[1], timeout_s=0.2)
                sub.close()
        finally:
            ctx.destroy(linger=0)
        new = [r.seq for t, r in after if t == "map"]
        assert svc.epoch == info["epoch"] and {r.epoch for t, r in after if t == "map"} == \
            {info["epoch"]}
        assert len(new) >= 20 and min(new) > max(old)
        assert new == sorted(set(new))

    def test_service_dropped_without_close_restarts_above_its_maps(self, tmp_path):
        """The same in one process: the first service is abandoned (no close(), as a crash
        would leave it) with its map saves stalled; a second service on the same state file
        publishes only seqs above the first one's."""
        cfg = loopback_config(tmp_path)
        plan = _plan(cfg)
        first = Service(cfg, driver=ScriptedDriver(plan, frames=0))
        first.start()
        first._io.state.min_interval_s = 3600.0
        first.controller.change = ReloadEveryTime(first.loader)
        old = [m.seq for est in ScriptedDriver(plan, frames=600).frames()
               if (m := first.process(est)) is not None]
        # The map on disk is the one saved with the last lease (seq 513 here: leases are
        # saved when seq 257 and 514 go out), far behind: a restart at "saved seq + a few"
        # would reuse seqs.
        assert len(old) >= 590
        assert StateStore(cfg.service.state_path).load().seq < max(old) - 16
        # Abandoned: its sockets are closed only so that the ports are free; state is not saved.
        first._io.maps.close()
        first._io.status.close()
        cfg2 = loopback_config(tmp_path)
        with Service(cfg2, driver=ScriptedDriver(plan, frames=0)) as second:
            second.controller.change = ReloadEveryTime(second.loader)
            new = [m.seq for est in ScriptedDriver(plan, frames=20, t0_s=100.0).frames()
                   if (m := second.process(est)) is not None]
        assert second.epoch == first.epoch and new and min(new) > max(old)


    def test_maps_are_held_back_while_the_lease_cannot_be_saved(self, tmp_path):
        """No durable ceiling, no map: the seq is not sent (it could be reused after a crash);
        the alarm shows it, and maps resume with the next seq once the disk is back."""
        folder = tmp_path / "state"
        folder.mkdir()
        cfg = loopback_config(tmp_path, service={"state_path": str(folder / "state.bin")})
        plan = _plan(cfg)
        estimates = iter(ScriptedDriver(plan, frames=400).frames())
        with Service(cfg, driver=ScriptedDriver(plan, frames=0)) as svc:
            svc._io.state.min_interval_s = 3600.0  # no lease renewal ahead of time
            svc.controller.change = ReloadEveryTime(svc.loader)
            ceiling = svc._io.state.ceiling
            while svc.controller.next_seq <= ceiling:
                svc.process(next(estimates))
            folder.rename(tmp_path / "gone")  # the state folder disappears
            assert svc.process(next(estimates)) is None
            assert svc.controller.held_back == 1 and svc.current_map.seq == ceiling
            assert "state_unsaved" in svc.status()["alarms"]
            (tmp_path / "gone").rename(folder)
            m = svc.process(next(estimates))
            assert m is not None and m.seq == ceiling + 1
            assert "state_unsaved" not in svc.status()["alarms"]
        assert StateStore(folder / "state.bin").load().seq_ceiling > ceiling + 1


class TestEpoch:
    def test_heartbeats_and_snapshots_name_the_epoch_before_the_first_map(self, tmp_path):
        cfg = loopback_config(tmp_path)
        ctx = zmq.Context()
        try:
            with Service(cfg, driver=ScriptedDriver(_plan(cfg), frames=0), context=ctx) as svc:
                assert len(svc.epoch) == 16
                sub = _map_sub(ctx, svc.endpoints["maps"])
                req = ctx.socket(zmq.REQ)
                req.setsockopt(zmq.LINGER, 0)
                req.connect(svc.endpoints["snapshots"])
                req.send(codec.SNAPSHOT_REQUEST)
                got = []
                assert _pump(svc, until=lambda: (_drain(sub, got), bool(got))[1])
                assert _pump(svc, until=lambda: bool(req.poll(0)))
                topic, snap = codec.decode(req.recv_multipart())
                assert svc.current_map is None
                assert got[0][0] == "heartbeat" and got[0][1]["epoch"] == svc.epoch
                assert got[0][1]["seq"] == -1
                assert (topic, snap) == ("snapshot", {"epoch": svc.epoch, "seq": -1})
                sub.close()
                req.close()
        finally:
            ctx.term()

    def test_a_restart_keeps_the_epoch_in_its_first_heartbeat(self, tmp_path):
        cfg = loopback_config(tmp_path)
        with Service(cfg, driver=ScriptedDriver(_plan(cfg), frames=0)) as first:
            epoch = first.epoch
        ctx = zmq.Context()
        try:
            with Service(cfg, driver=ScriptedDriver(_plan(cfg), frames=0), context=ctx) as svc:
                assert svc.epoch == epoch
                sub = _map_sub(ctx, svc.endpoints["maps"])
                got = []
                assert _pump(svc, until=lambda: (_drain(sub, got), bool(got))[1])
                assert got[0][1]["epoch"] == epoch
                sub.close()
        finally:
            ctx.term()


class TestFallback:
    def test_gap_in_source_time_brings_fallback_then_normal_maps(self):
        cfg = loopback_config(fallback={"stale_after_s": 0.5, "bits": 1})
        drv = ScriptedDriver(_plan(cfg), frames=300, gaps=[(1.0, 2.0)])
        with Service(cfg, driver=drv) as svc:
            assert _pump(svc, until=lambda: _drained(svc))
            kinds = [(c.kind, c.time_s) for c in svc.controller.changes]
            fb = [i for i, (k, _) in enumerate(kinds) if k == "fallback"]
            assert len(fb) == 1
            # Sent at the time a live daemon would have: last valid frame + stale_after_s.
            assert kinds[fb[0]][1] == pytest.approx(0.99 + 0.5)
            assert any(k != "fallback" for k, _ in kinds[fb[0] + 1:])
            assert not svc.current_map.fallback and not svc.controller.fallback_active

    def test_silent_source_brings_fallback_on_the_clock(self):
        cfg = loopback_config(fallback={"stale_after_s": 0.3, "bits": 2})
        release = threading.Event()
        adopted: list[LoadMap] = []
        drv = ScriptedDriver(_plan(cfg), frames=120, hold_at=60, release=release)
        with Service(cfg, driver=drv) as svc, _follower(svc, adopted) as f:
            assert _pump(svc, [f], until=lambda: svc.controller.fallback_active)
            st = svc.status()
            assert "stale" in st["alarms"] and "fallback" in st["alarms"]
            assert _pump(svc, [f], until=lambda: f.current is not None and f.current.fallback)
            assert np.all(f.current.bits == 2)
            release.set()
            assert _pump(svc, [f], until=lambda: _drained(svc)
                         and not svc.controller.fallback_active)
            assert "stale" not in svc.status()["alarms"]


class TestRobustness:
    def test_bad_frames_are_dropped_and_counted(self):
        cfg = loopback_config()
        with Service(cfg, driver=ScriptedDriver(_plan(cfg), frames=100, bad_every=10)) as svc:
            assert _pump(svc, until=lambda: _drained(svc))
            st = svc.status()
        assert st["frames"]["received"] == 100
        assert st["frames"]["rejected"] == {"non_finite": 10}
        assert st["frames"]["accepted"] == 90

    def test_estimate_of_another_tone_plan_is_dropped(self):
        from brimline.drivers.link.frame import make_plan

        cfg = loopback_config()
        other = make_plan(fft_size=256, used_tones_half=90)
        with Service(cfg, driver=ScriptedDriver(_plan(cfg), frames=1)) as svc:
            for est in ScriptedDriver(other, frames=5).frames():
                assert svc.process(est) is None
            assert svc.controller.rejected["other_plan"] == 5 and svc.current_map is None

    def test_undecodable_hand_off_is_counted(self):
        cfg = loopback_config()
        with Service(cfg, driver=ScriptedDriver(_plan(cfg), frames=1)) as svc:
            svc._handle_inproc([zmq.Frame(b"estimate"), zmq.Frame(b"{not json")])
            assert svc.controller.frames["decode_errors"] == 1

    def test_driver_failure_is_reported_not_raised(self):
        cfg = loopback_config()
        with Service(cfg, driver=ScriptedDriver(_plan(cfg), frames=100, fail_at=40)) as svc:
            assert _pump(svc, until=lambda: svc.driver_state == "failed")
            st = svc.publish_status()
            assert "driver_failed" in st["alarms"]
            assert "scripted driver failure" in st["driver"]["error"]
            svc.run(0.2)  # the loop keeps serving after the source died
            assert svc.current_map is not None

    def test_status_stream_on_loopback(self):
        cfg = loopback_config()
        ctx = zmq.Context()
        sub = ctx.socket(zmq.SUB)
        sub.setsockopt(zmq.LINGER, 0)
        sub.setsockopt(zmq.SUBSCRIBE, codec.TOPIC_STATUS.encode())
        try:
            with Service(cfg, driver=ScriptedDriver(_plan(cfg), frames=50)) as svc:
                sub.connect(svc.endpoints["status"])
                got = []

                def one():
                    if sub.poll(0):
                        got.append(codec.decode(sub.recv_multipart())[1])
                    return bool(got) and got[-1]["frames"]["received"] == 50

                assert _pump(svc, until=one)
            st = got[-1]
            assert st["type"] == "status" and st["map"]["seq"] == svc.current_map.seq
            assert len(st["band"]["snr_db"]) == st["band"]["columns"] == len(st["band"]["tone_index"])
        finally:
            sub.close()
            ctx.term()

    def test_recording_keeps_every_estimate_and_map(self, tmp_path):
        path = tmp_path / "run.brlog"
        cfg = loopback_config(record={"path": str(path), "topics": ["estimate", "map"]})
        with Service(cfg, driver=ScriptedDriver(_plan(cfg), frames=80,
                                                fades=[(0.4, 0, 30, 10.0)])) as svc:
            assert _pump(svc, until=lambda: _drained(svc))
            published = sum(svc.controller.maps_published.values())
        with RecordReader(path) as reader:
            records = list(reader)
        topics = [t for t, _ in records]
        assert topics.count("estimate") == 80
        assert topics.count("map") == published
        # Each map follows the estimate that made it (both are written after the send).
        last_frame = -1
        for t, r in records:
            if t == "estimate":
                last_frame = r.frame
            elif t == "map":
                assert r.effective_frame == last_frame + cfg.service.lead_frames

    def test_close_is_idempotent_and_ordered(self):
        cfg = loopback_config()
        svc = Service(cfg, driver=ScriptedDriver(_plan(cfg), frames=10_000))
        svc.start()
        svc.run(0.1)
        svc.close()
        svc.close()
        assert not svc._handoff.alive  # joined before the final status and the sockets
        assert svc.last_status["driver"]["state"] == "stopped"


class TestStatusFigures:
    def test_rate_uses_the_ofdm_symbol_rate(self):
        """IEEE 802.11a-1999 clause 17 numerology: 20 MHz, 64-point FFT, 16-sample cyclic
        prefix, i.e. a 4 us symbol (250 ksymbol/s). 48 data tones of 16-QAM carry 192 coded
        bits per symbol (N_CBPS = 192 for 16-QAM in the rate table of 17.3.2.2, from
        memory), so the raw rate is 48 Mbit/s; at code rate 3/4 that is the standard's
        36 Mbit/s mode."""
        tones = np.r_[-26:0, 1:27]
        data = np.setdiff1d(tones, [-21, -7, 7, 21])
        assert data.size == 48
        m = LoadMap(epoch="e", seq=0, effective_frame=0, created_s=0.0, plan_id="p",
                    tone_index=data, bits=np.full(48, 4), power_lin=np.ones(48),
                    total_bits=192, margin_db=0.0, gap_db=0.0)
        st = build_status(time_s=0.0, epoch="e", driver={}, frames={}, estimate_age_s=None,
                          tone_index=data, snr_db=None, current_map=m,
                          symbol_rate_hz=20e6 / (64 + 16))
        assert st["rate"]["rate_bps"] == pytest.approx(48e6)
        assert st["rate"]["rate_bps"] * 3 / 4 == pytest.approx(36e6)

    def test_data_rate_counts_data_symbols_only(self):
        """The same 802.11a numerology as above (48 data tones of 16-QAM, 250 ksymbol/s, so a
        line rate of 48 Mbit/s; IEEE 802.11a-1999 clause 17, from memory) in frames of 16
        symbols of which 12 carry data, sent back to back (15625 frames/s): the data rate is
        48 Mbit/s x 12 / 16 = 36 Mbit/s. And the demo link's figure worked by hand from its
        config: 754 bits per data symbol x 12 data symbols x 50 frames/s = 452.4 kbit/s."""
        tones = np.r_[-26:0, 1:27]
        data = np.setdiff1d(tones, [-21, -7, 7, 21])
        m = LoadMap(epoch="e", seq=0, effective_frame=0, created_s=0.0, plan_id="p",
                    tone_index=data, bits=np.full(48, 4), power_lin=np.ones(48),
                    total_bits=192, margin_db=0.5, gap_db=0.0)
        st = build_status(time_s=0.0, epoch="e", driver={}, frames={}, estimate_age_s=None,
                          tone_index=data, snr_db=None, current_map=m,
                          symbol_rate_hz=20e6 / (64 + 16), frame_rate_hz=20e6 / 80 / 16,
                          data_symbols=12, symbols_per_frame=16, target_margin_db=3.0)
        assert st["rate"]["line_rate_bps"] == st["rate"]["rate_bps"] == pytest.approx(48e6)
        assert st["rate"]["data_rate_bps"] == pytest.approx(36e6)
        assert st["margin"] == {"headroom_db": 0.5, "target_db": 3.0}
        assert st["margin_db"] == st["margin"]["headroom_db"]
        demo = LoadMap(epoch="e", seq=0, effective_frame=0, created_s=0.0, plan_id="p",
                       tone_index=np.arange(1, 175), bits=np.r_[np.full(100, 4),
                                                               np.full(74, 5)],
                       power_lin=np.ones(174), total_bits=754, margin_db=0.0, gap_db=0.0)
        st = build_status(time_s=0.0, epoch="e", driver={}, frames={}, estimate_age_s=None,
                          tone_index=demo.tone_index, snr_db=None, current_map=demo,
                          frame_rate_hz=50.0, data_symbols=12)
        assert st["rate"]["data_rate_bps"] == pytest.approx(452.4e3)
        assert st["rate"]["line_rate_bps"] is None  # no symbol rate given

    def test_data_rate_is_unknown_without_a_frame_rate(self):
        cfg = loopback_config()
        st = build_status(time_s=0.0, epoch="e", driver={}, frames={}, estimate_age_s=None,
                          tone_index=None, snr_db=None, **frame_fields(_plan(cfg)))
        assert st["rate"]["data_symbols"] == cfg.link.data_symbols
        assert st["rate"]["symbols_per_frame"] == cfg.link.data_symbols + \
            cfg.link.train_symbols + 2
        assert st["rate"]["data_rate_bps"] is None

    def test_frame_rate_comes_from_a_source_that_knows_it(self):
        """The simulator paces frames at ``frame_rate_hz``: the status takes it from there; a
        source without one leaves the data rate unknown rather than guessing."""
        from brimline.daemon.runtime.status import driver_fields

        class Paced:
            name, frame_rate_hz, counters = "sim", 50.0, {}

        class Unpaced:
            name, counters = "pushed", {}

        assert driver_fields(Paced(), "running", None)["frame_rate_hz"] == 50.0
        assert driver_fields(Unpaced(), "running", None)["frame_rate_hz"] is None

    def test_band_groups_hold_whole_tones_in_the_plan_numbering(self):
        """Groups of whole tones, each named by its first tone (the plan's signed bins); with
        more tones than columns every group holds ceil(N / columns) tones. Reference: numpy's
        minimum.reduceat over the same starts."""
        tones = np.r_[-99:0, 1:100]
        snr = np.linspace(5.0, 30.0, tones.size)
        st = build_status(time_s=0.0, epoch="e", driver={}, frames={}, estimate_age_s=None,
                          tone_index=tones, snr_db=snr, columns=64)
        band = st["band"]
        per = band["tones_per_column"]
        assert per == -(-198 // 64) == 4 and band["columns"] == 50
        assert band["tone_index"] == tones[::4].tolist()
        assert band["snr_db"] == np.round(np.minimum.reduceat(snr, np.arange(0, 198, 4)),
                                          1).tolist()
        full = build_status(time_s=0.0, epoch="e", driver={}, frames={}, estimate_age_s=None,
                            tone_index=tones, snr_db=snr)
        assert full["band"]["tones_per_column"] == 1
        assert full["band"]["tone_index"] == tones.tolist()

    def test_band_columns_match_numpy_reduceat(self):
        """Independent reference: numpy.minimum.reduceat / add.reduceat over the same groups."""
        rng = np.random.default_rng(3)
        v = rng.normal(20, 5, 1000)
        cols = band_columns(v, 128, "min")
        edges = np.linspace(0, 1000, 129).round().astype(int)[:-1]
        assert np.allclose(cols, np.minimum.reduceat(v, edges))
        means = band_columns(v, 128, "mean")
        widths = np.diff(np.r_[edges, 1000])
        assert np.allclose(means, np.add.reduceat(v, edges) / widths)

    def test_status_is_strict_json(self):
        import json

        st = build_status(time_s=float("nan"), epoch="e", driver={"state": "running"},
                          frames={}, estimate_age_s=float("inf"), tone_index=None, snr_db=None)
        json.dumps(st, allow_nan=False)
        assert st["alarms"] == ["no_map"]


def _plan(cfg):
    from brimline.drivers.link.frame import make_plan

    return make_plan(**cfg.link.model_dump())


class TestClosedLoop:
    def test_sim_daemon_follower_adapts_to_a_fade(self):
        """sim -> daemon -> follower and back: the simulated transmitter follows the maps
        through a real Follower on loopback, acknowledges them, and after a 20 dB fade of a band
        the maps carry fewer bits there (loading with an SNR gap: b = log2(1 + SNR/gap), so a
        20 dB loss costs about 20 / 3.01 = 6.6 bits on a tone that had them)."""
        sim = {"profile": "awgn", "doppler_hz": 0.0, "snr_db": 27.0, "realtime": False,
               "max_frames": 160, "frame_rate_hz": 50.0, "seed": 5,
               "events": [{"start_s": 1.2, "first_tone": -90, "last_tone": -30,
                           "depth_db": 20.0}]}
        cfg = loopback_config(driver={"kind": "sim", "sim": sim},
                              estimator={"tau_s": 0.5, "tone_window": 2},
                              change={"up_dwell_s": 0.5, "downshift_margin_db": -3.0})
        with Service(cfg) as svc:
            assert _pump(svc, until=lambda: _drained(svc), timeout_s=20.0)
            tones = svc.plan.data_tones
            band = (tones >= -90) & (tones <= -30)
            before = [c for c in svc.controller.changes if c.time_s < 1.2]
            assert before, "no map before the fade"
            final = svc.current_map
            assert final.created_s > 1.2
            # Fast mode runs in lockstep: the transmitter gets the maps directly and sends the
            # final one from its effective frame on.
            assert svc.lockstep and svc.driver.last_seq == final.seq
            assert final.bits[band].mean() < final.bits[~band].mean() - 3
            assert any(c.kind in ("emergency", "reload", "bit_swap") and c.time_s >= 1.2
                       for c in svc.controller.changes)
            assert svc.last_status["link"]["frames"] > 0

    def test_realtime_sim_follows_through_a_follower(self):
        """Real-time mode keeps the live path: the simulated transmitter follows the published
        maps through a real Follower on loopback and acknowledges them (frames paced at 400 per
        second of the monotonic clock; the deadline only catches a hang)."""
        sim = {"profile": "awgn", "doppler_hz": 0.0, "snr_db": 27.0, "realtime": True,
               "max_frames": 200, "frame_rate_hz": 400.0, "seed": 5}
        cfg = loopback_config(driver={"kind": "sim", "sim": sim},
                              estimator={"tau_s": 0.05}, change={"up_dwell_s": 0.1})
        with Service(cfg) as svc:
            assert not svc.lockstep
            assert _pump(svc, until=lambda: _drained(svc), timeout_s=30.0)
            assert svc.current_map is not None
            assert svc.acks and svc.acks["followers"]["count"] >= 1  # the transmitter followed
            assert svc.driver.last_seq >= 0


class FakeClock:
    """A monotonic clock that moves ``tick_s`` at every read: time passes only as the service
    works, so a flood of estimates costs time whatever the machine's speed or load."""

    def __init__(self, tick_s: float, start_s: float = 1000.0) -> None:
        self.tick_s = tick_s
        self.now_s = start_s

    def __call__(self) -> float:
        self.now_s += self.tick_s
        return self.now_s


def test_heartbeats_stay_on_time_under_a_flood_of_estimates():
    """A heartbeat goes out at every due time (heartbeat_s = 0.1 s of the service's clock) while
    the source floods the loop: with a clock that moves 1 ms at each read (at least one read per
    estimate), a step that took every waiting estimate (up to 128 queued, 256 per step before)
    would delay heartbeats by 0.1 s or more; one bounded by the clock is late by a few reads."""
    cfg = loopback_config()
    clock = FakeClock(0.001)
    ctx = zmq.Context()
    sub = ctx.socket(zmq.SUB)
    sub.setsockopt(zmq.LINGER, 0)
    sub.setsockopt(zmq.SUBSCRIBE, codec.TOPIC_HEARTBEAT.encode())
    beats = []  # (heartbeat time_s, estimates received by then)
    try:
        drv = ScriptedDriver(_plan(cfg), frames=1_000_000, frame_s=0.001)
        with Service(cfg, driver=drv, clock=clock) as svc:
            sub.connect(svc.endpoints["maps"])

            def beat():
                while sub.poll(0):
                    _t, hb = codec.decode(sub.recv_multipart())
                    beats.append((hb["time_s"], svc.controller.received))
                return len(beats) >= 40

            assert _pump(svc, until=beat, timeout_s=60.0)
    finally:
        sub.close()
        ctx.term()
    times = np.array([t for t, _ in beats[1:]])
    received = np.array([n for _, n in beats[1:]])
    assert received[-1] - received[0] >= 200  # estimates kept coming all along
    assert np.all(np.diff(times) <= cfg.publish.heartbeat_s + 0.03)


class _FailingRecorder:
    """Stands in for a RecordWriter on a disk that just filled up: every write fails, and so
    does close (as a raw OSError would)."""

    def __init__(self) -> None:
        self.closes = 0

    def write(self, topic, record):
        return self.write_frames([topic.encode()])

    def write_frames(self, frames):
        raise RecordingError("run.brlog: write failed: [Errno 28] No space left on device")

    def close(self):
        self.closes += 1
        raise OSError(28, "No space left on device")


class TestRecording:
    def test_recording_keeps_decisions_and_status(self, tmp_path):
        """The default record topics: estimates, maps, decisions and status messages."""
        path = tmp_path / "run.brlog"
        cfg = loopback_config(record={"path": str(path)})
        assert cfg.record.topics == ["estimate", "map", "decision", "status"]
        with Service(cfg, driver=ScriptedDriver(_plan(cfg), frames=120,
                                                fades=[(0.5, 0, 40, 12.0)])) as svc:
            assert _pump(svc, until=lambda: _drained(svc))
            svc.publish_status()
            changes = list(svc.controller.changes)
        with RecordReader(path) as reader:
            records = list(reader)
        decisions = [r for t, r in records if t == "decision"]
        maps = [r for t, r in records if t == "map"]
        statuses = [r for t, r in records if t == "status"]
        assert len(decisions) == len(maps) >= 2
        # One decision per map, same seq, kind and reason as the history shows.
        assert [d["seq"] for d in decisions] == [m.seq for m in maps]
        assert [(d["kind"], d["reason"], d["seq"]) for d in decisions][-len(changes):] == \
            [(c.kind, c.reason, c.seq) for c in changes]
        assert all(d["time_s"] == m.created_s for d, m in zip(decisions, maps))
        assert [d["bits_after"] for d in decisions] == [m.total_bits for m in maps]
        assert [d["bits_before"] for d in decisions[1:]] == [m.total_bits for m in maps[:-1]]
        assert decisions[0]["cause"] == "first_map" and all(d["cause"] for d in decisions)
        # Status messages as published; the last one is the final status of close().
        assert len(statuses) >= 2 and statuses[-1]["driver"]["state"] == "ended"
        assert statuses[-1]["recording"] == {"state": "on", "path": str(path), "error": None}
        # The recorded order: each decision right before its map.
        topics = [t for t, _ in records if t in ("decision", "map")]
        assert topics == ["decision", "map"] * len(maps)

    def test_a_recording_that_cannot_be_written_never_stops_the_maps(self, tmp_path, caplog):
        path = tmp_path / "run.brlog"
        cfg = loopback_config(record={"path": str(path)})
        failing = _FailingRecorder()
        gate = threading.Event()
        drv = ScriptedDriver(_plan(cfg), frames=150, fades=[(0.7, 0, 40, 12.0)], gate=gate)
        with caplog.at_level("ERROR", logger="brimline"):
            with Service(cfg, driver=drv) as svc:
                svc._io.recorder.close()
                svc._io.recorder = failing  # the disk fills up now
                gate.set()
                assert _pump(svc, until=lambda: _drained(svc))
                st = svc.publish_status()
                maps = svc.controller.maps_published
                assert svc.controller.frames["received"] == 150  # adapting went on
                assert sum(maps.values()) >= 2 and svc.current_map.created_s > 0.7
        assert failing.closes == 1
        assert st["recording"]["state"] == "failed"
        assert "No space left" in st["recording"]["error"]
        assert "recording_failed" in st["alarms"]
        errors = [r for r in caplog.records if r.levelname == "ERROR"]
        assert len(errors) == 1 and "recording stopped" in errors[0].getMessage()


class TestOuterLoopFeedback:
    def test_outcomes_reach_the_outer_loop_and_bad_ones_are_dropped(self):
        """Outcomes pushed to the daemon's outcome PULL reach the outer loop (status
        ``outer``); garbage and foreign epochs are dropped and counted, never raised."""
        cfg = loopback_config(publish={"outcome_endpoint": "tcp://127.0.0.1:0"},
                              outer={"step_up_db": 0.5, "quiet_s": 1000.0})
        ctx = zmq.Context()
        push = ctx.socket(zmq.PUSH)
        push.setsockopt(zmq.LINGER, 0)
        try:
            with Service(cfg, driver=ScriptedDriver(_plan(cfg), frames=50)) as svc:
                push.connect(svc.endpoints["outcomes"])
                epoch = svc.controller.epoch
                push.send_multipart([b"outcome", b"\xff\xfe not json"])
                push.send_multipart(codec.encode(codec.TOPIC_OUTCOME, FrameOutcome(
                    "someone-else", 0, 1, True, 0.0)))
                push.send_multipart(codec.encode(codec.TOPIC_OUTCOME, FrameOutcome(
                    epoch, 0, 2, True, 0.0)))
                assert _pump(svc, until=lambda: svc.status()["outer"]["outcomes"] == 1
                             and svc.status()["outer"]["dropped"] == {"other_epoch": 1,
                                                                      "undecodable": 1})
                st = svc.status()
            assert st["outer"]["offset_db"] == 0.5 and st["outer"]["errored"] == 1
            assert st["outer"]["target_fer"] == 0.1
        finally:
            push.close()
            ctx.term()


class _ListHandler(logging.Handler):
    def __init__(self):
        super().__init__()
        self.records: list[logging.LogRecord] = []

    def emit(self, record):
        self.records.append(record)


@pytest.fixture
def service_log():
    """The records of the ``brimline.service`` logger (``run`` stops them propagating)."""
    handler = _ListHandler()
    logger = logging.getLogger("brimline.service")
    old = logger.level
    logger.addHandler(handler)
    logger.setLevel(logging.INFO)
    yield handler.records
    logger.removeHandler(handler)
    logger.setLevel(old)


class TestLinkTime:
    def test_duration_counts_link_time_not_wall_time(self):
        """Frames every 10 ms of source time: a run of 0.5 s uses exactly the first 50, the
        one at 0.50 s is not used, however long the machine took."""
        cfg = loopback_config()
        with Service(cfg, driver=ScriptedDriver(_plan(cfg), frames=200, frame_s=0.01)) as svc:
            svc.run(0.5)
            assert svc.controller.accepted == 50

    def test_map_lines_carry_link_time_and_fields(self, service_log):
        cfg = loopback_config()
        with Service(cfg, driver=ScriptedDriver(_plan(cfg), frames=30, t0_s=7.0)) as svc:
            svc.run(5.0)
        maps = [r for r in service_log if getattr(r, "fields", {}).get("event") == "map"]
        assert maps and len(maps) == len(svc.timeline)
        first = maps[0].fields
        assert first["link_time_s"] == pytest.approx(7.0) and first["cause"] == "first_map"
        assert first["bits_before"] is None and first["bits_after"] > 0
        assert first["margin_target_db"] == cfg.loading.margin_db
        assert "at link time 7.00 s" in maps[0].getMessage()

    def test_falling_behind_real_time_is_said_once(self, service_log):
        """A paced source whose frames (10 ms apart) arrive while a fake wall clock runs much
        faster: one warning, naming how far behind; the worst lag is kept."""

        class Paced(ScriptedDriver):
            realtime = True

        class FastWall:
            now_s = 0.0

            def __call__(self):
                self.now_s += 0.05
                return self.now_s

        cfg = loopback_config()
        with Service(cfg, driver=Paced(_plan(cfg), frames=100), clock=FastWall()) as svc:
            assert _pump(svc, until=lambda: _drained(svc))
        behind = [r for r in service_log
                  if getattr(r, "fields", {}).get("event") == "behind_real_time"]
        assert len(behind) == 1
        assert behind[0].fields["behind_s"] > 0.5
        assert "behind real time at link time" in behind[0].getMessage()
        assert svc.behind_max_s >= behind[0].fields["behind_s"]

    def test_an_unpaced_source_is_never_behind(self, service_log):
        cfg = loopback_config()
        with Service(cfg, driver=ScriptedDriver(_plan(cfg), frames=50)) as svc:
            assert _pump(svc, until=lambda: _drained(svc))
        assert svc.behind_max_s == 0.0
        assert not [r for r in service_log if "behind real time" in r.getMessage()]
