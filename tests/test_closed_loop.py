"""Closed loop: payload CRC, link accounting, map schedule, baselines and the lockstep service.

Scenarios are invented for tests (seeded); the channel profiles are the published tapped delay
lines of drivers/air/channel.py.
"""

from __future__ import annotations

import binascii
import time
import zlib

import numpy as np
import pytest
from _service_fakes import loopback_config

from brimline.daemon.core.change import ChangeControl
from brimline.daemon.core.controller import LinkController
from brimline.daemon.core.estimator import Estimator
from brimline.daemon.core.outer import OuterLoop
from brimline.daemon.records import LoadMap
from brimline.daemon.runtime.config import (
    ChangeSection,
    EstimatorSection,
    LoadingSection,
    OuterSection,
)
from brimline.daemon.runtime.service import Service
from brimline.daemon.wire import codec
from brimline.daemon.wire.recording import read_recording
from brimline.drivers.link.frame import (
    CRC_BITS,
    Transmitter,
    crc32,
    make_plan,
    payload_data_bits,
    payload_ok,
    payload_stream,
    payload_values,
)
from brimline.drivers.link.receiver import LinkTally
from brimline.drivers.link.schedule import MapSchedule
from brimline.drivers.sources.closed_loop import (
    FixedMaps,
    OracleMaps,
    best_fixed,
    frame_ser_target,
    run_closed_loop,
)
from brimline.drivers.sources.sim import SimDriver


@pytest.fixture(scope="module")
def plan():
    return make_plan()


def _crc32_bitwise(data: bytes) -> int:
    """CRC-32 straight from its definition (IEEE 802.3 clause 3.2.9: generator polynomial
    0x04C11DB7, register preset to all ones, complemented result; bits taken least significant
    first, hence the reflected constant 0xEDB88320), one bit at a time."""
    crc = 0xFFFFFFFF
    for byte in data:
        crc ^= byte
        for _ in range(8):
            crc = (crc >> 1) ^ (0xEDB88320 if crc & 1 else 0)
    return crc ^ 0xFFFFFFFF


class TestCrc32:
    def test_check_value(self):
        """The CRC-32 check value of "123456789" is 0xCBF43926 (the catalogue value of the
        IEEE 802.3 CRC-32, from memory; also what zlib and binascii give)."""
        assert crc32(b"123456789") == 0xCBF43926 == zlib.crc32(b"123456789")
        assert crc32(b"123456789") == binascii.crc32(b"123456789")

    def test_matches_the_polynomial_definition(self, rng):
        for n in (0, 1, 7, 100):
            data = rng.integers(0, 256, n, dtype=np.uint8).tobytes()
            assert crc32(data) == _crc32_bitwise(data) == binascii.crc32(data)


class TestPayload:
    def test_stream_round_trip(self, rng):
        bits = np.array([0, 1, 2, 5, 10, 3])
        values = rng.integers(0, 1 << bits, size=(4, bits.size))
        stream = payload_stream(values, bits)
        assert stream.size == 4 * bits.sum()
        np.testing.assert_array_equal(payload_values(stream, bits, 4), values)
        # Most significant bit first: tone 3 (5 bits) of symbol 0 starts at offset 0+1+2.
        first = int("".join(map(str, stream[3:8])), 2)
        assert first == values[0, 3]

    def test_frame_payload_passes_its_crc(self, plan, rng):
        tx = Transmitter(plan)
        bits = rng.integers(0, 9, plan.data_tones.size)
        frame = tx.frame(bits=bits, power_lin=np.ones(bits.size), map_seq=3, counter=0, rng=rng)
        assert payload_ok(frame.values, bits)
        stream = payload_stream(frame.values, bits)
        word = np.packbits(stream[-CRC_BITS:]).tobytes()
        assert int.from_bytes(word, "big") == zlib.crc32(np.packbits(stream[:-CRC_BITS]))

    def test_crc_catches_errors(self, plan, rng):
        """Every single-bit and every random burst error of up to 32 bits is caught (a CRC of
        degree 32 detects all bursts up to 32 bits: a property of cyclic codes)."""
        tx = Transmitter(plan)
        bits = np.full(plan.data_tones.size, 4)
        frame = tx.frame(bits=bits, power_lin=np.ones(bits.size), map_seq=3, counter=0, rng=rng)
        stream = payload_stream(frame.values, bits)
        for pos in rng.choice(stream.size, 40, replace=False):
            bad = stream.copy()
            bad[pos] ^= 1
            assert not payload_ok(payload_values(bad, bits, plan.data_symbols), bits)
        for _ in range(40):
            length = int(rng.integers(2, 33))
            start = int(rng.integers(0, stream.size - length))
            bad = stream.copy()
            flip = rng.integers(0, 2, length).astype(np.uint8)
            flip[0] = flip[-1] = 1
            bad[start:start + length] ^= flip
            assert not payload_ok(payload_values(bad, bits, plan.data_symbols), bits)

    def test_no_payload_below_the_crc(self):
        assert payload_data_bits(np.zeros(10, int), 12) == 0
        assert payload_data_bits(np.array([1, 1]), 16) == 0  # 32 bits: the CRC alone
        assert payload_data_bits(np.array([1, 2]), 12) == 36 - CRC_BITS


class TestLinkTally:
    def test_hand_made_counts(self):
        """Four frames of 2 symbols x 3 tones with bits (2, 4, 12): 36 payload bits each,
        4 data bits after the CRC. Frame 0 arrives intact, frame 1 with two bit errors
        (CRC fails), frame 2 is lost, frame 3 carries no payload (all tones off)."""
        rng = np.random.default_rng(1)
        bits = np.array([2, 4, 12])
        tally = LinkTally(frame_period_s=0.02)
        sent = []
        for _ in range(2):
            stream = rng.integers(0, 2, 36).astype(np.uint8)
            stream[-32:] = np.unpackbits(np.frombuffer(
                zlib.crc32(np.packbits(stream[:-32])).to_bytes(4, "big"), np.uint8))
            sent.append(payload_values(stream, bits, 2))
        assert tally.add(sent[0], bits, sent[0].copy()) is True
        wrong = sent[1].copy()
        wrong[0, 1] ^= 0b0101  # two bits of tone 1, symbol 0
        assert tally.add(sent[1], bits, wrong) is False
        assert tally.add(sent[0], bits, None) is False
        off = np.zeros(3, int)
        assert tally.add(np.zeros((2, 3), int), off, np.zeros((2, 3), int)) is False
        s = tally.summary()
        assert (s["frames"], s["frames_ok"], s["frame_errors"], s["frames_lost"]) == (3, 1, 2, 1)
        assert (s["bits"], s["bit_errors"], s["goodput_bits"]) == (72, 2, 4)
        assert s["frame_error_rate"] == pytest.approx(2 / 3)
        assert s["bit_error_rate"] == pytest.approx(2 / 72)
        assert s["link_time_s"] == pytest.approx(4 * 0.02)
        assert s["goodput_bps"] == pytest.approx(4 / 0.08)
        assert tally.crc_missed == 0

    def test_empty(self):
        s = LinkTally(0.02).summary()
        assert s["frame_error_rate"] is None and s["goodput_bps"] is None


class TestMapSchedule:
    def _m(self, plan, seq, effective):
        n = plan.data_tones.size
        return LoadMap(epoch="e", seq=seq, effective_frame=effective, created_s=0.0,
                       plan_id=plan.plan_id, tone_index=plan.data_tones, bits=np.full(n, 2),
                       power_lin=np.ones(n), total_bits=2 * n, margin_db=0.0, gap_db=0.0)

    def test_in_force_from_the_effective_frame(self, plan):
        s = MapSchedule()
        s.schedule(self._m(plan, 0, 3))
        s.schedule(self._m(plan, 1, 5))
        got = [None if s(f) is None else s(f).seq for f in range(7)]
        assert got == [None, None, None, 0, 0, 1, 1]

    def test_restored_map_from_frame_zero(self, plan):
        s = MapSchedule()
        s.schedule(self._m(plan, 9, 100000), from_frame=0)
        assert s(0).seq == 9


def _controller(plan, loader, lead_frames=2):
    est = Estimator(**EstimatorSection().model_dump())
    cc = ChangeControl(loader, **ChangeSection().model_dump())
    return LinkController(plan, est, cc, gap_db=loader.gap_db, epoch="test",
                          lead_frames=lead_frames)


class TestBaselines:
    def test_frame_ser_target(self):
        """1 - (1 - p)^n = FER: n = 1 gives FER itself; small p: FER ~ n p."""
        assert frame_ser_target(0.1, 1) == pytest.approx(0.1)
        assert frame_ser_target(0.01, 1000) * 1000 == pytest.approx(0.01, rel=0.01)

    def test_adaptive_beats_fixed_on_a_frequency_selective_channel(self, plan):
        """Static ITU-R M.1225 Pedestrian B at 25 dB: a band with fixed notches. A fixed
        constellation on every tone at flat power is limited by the notches; adaptive loading
        leaves the worst tones light and loads the good ones up, so it delivers at least 1.2x
        the best fixed constellation that meets the frame error target on the same channel
        realisation, start-up frames (default map) included."""
        kw = dict(plan=plan, profile="ped_b", doppler_hz=0.0, snr_db=25.0, realtime=False,
                  seed=4)
        target_fer = 0.1  # 3GPP TS 36.213 sec. 7.2.3: CQI for a 10 % block error rate
        ser = frame_ser_target(target_fer, plan.data_symbols * plan.data_tones.size)
        loader = LoadingSection(target_ser=ser).loader()
        with SimDriver(**kw) as sim:
            adaptive = run_closed_loop(sim, 60, controller=_controller(plan, loader))
        b, fixed = best_fixed(lambda: SimDriver(**kw), 30, target_fer, range(1, 6))
        assert b is not None and fixed.frame_error_rate <= target_fer
        assert adaptive.goodput_bps > 1.2 * fixed.goodput_bps
        assert adaptive.frame_error_rate <= target_fer
        # Once the first map is in force the adaptive link keeps it or improves on it.
        assert (adaptive.sent_seq[-20:] >= 0).all() and adaptive.maps_per_min > 0

    def test_oracle_loads_the_true_snr(self, plan):
        """The oracle's map for a frame is the loader's allocation for that frame's true SNR."""
        loader = LoadingSection().loader()
        with SimDriver(plan=plan, profile="eva", doppler_hz=0.0, realtime=False,
                       seed=2) as sim:
            oracle = OracleMaps(sim, loader)
            alloc = loader(10 ** (sim.truth(5).snr_db / 10))
            m = oracle(5)
            np.testing.assert_array_equal(m.bits, alloc.bits)
            assert oracle(6) is m  # static channel: same map, same seq

    def test_fixed_map_is_flat(self, plan):
        m = FixedMaps(plan, 3).map
        assert set(m.bits.tolist()) == {3} and np.all(m.power_lin == 1.0)


def _demo_like(tmp_path, name):
    sim = {"profile": "ped_b", "doppler_hz": 0.0, "snr_db": 27.0, "cfo_hz": 900.0,
           "drift_db": 1.5, "drift_period_s": 4.0, "interferer_tone": 37.5,
           "interferer_db": 12.0, "interferer_start_s": 2.0, "realtime": False,
           "max_frames": 180, "frame_rate_hz": 50.0, "seed": 20261201,
           "events": [{"start_s": 1.0, "stop_s": 2.4, "first_tone": -90, "last_tone": -25,
                       "depth_db": 20.0}]}
    return loopback_config(driver={"kind": "sim", "sim": sim},
                           estimator={"tau_s": 0.3, "tone_window": 2},
                           change={"up_dwell_s": 0.5, "downshift_margin_db": -3.0},
                           record={"path": str(tmp_path / name), "topics": ["map"]})


def test_seeded_fast_run_repeats_exactly(tmp_path):
    """Two fast runs of a demo-like seeded config (fade, beacon, drift) publish the same maps,
    byte for byte once encoded (epoch included), whatever the machine did meanwhile."""
    runs = []
    for k in range(2):
        cfg = _demo_like(tmp_path, f"run{k}.brec")
        with Service(cfg) as svc:
            assert svc.lockstep
            deadline = time.monotonic() + 120.0  # only catches a hang
            while svc.driver_state == "running" and time.monotonic() < deadline:
                svc.step(0.01)
            assert svc.driver_state == "ended"
            link = svc.status()["link"]
        maps = [b"".join(bytes(f) for f in codec.encode(codec.TOPIC_MAP, m))
                for topic, m in read_recording(tmp_path / f"run{k}.brec") if topic == "map"]
        runs.append((maps, link))
    assert len(runs[0][0]) >= 3
    assert runs[0][0] == runs[1][0]
    assert runs[0][1] == runs[1][1]
    assert runs[0][1]["frames"] == 180


def test_lockstep_restart_sends_the_restored_map_from_the_first_frame(tmp_path):
    """After a restart with saved state, the simulated transmitter sends the restored map from
    frame 0 (its effective frame belongs to the earlier run's frame numbers)."""
    sim = {"profile": "awgn", "snr_db": 27.0, "realtime": False, "max_frames": 40, "seed": 3}
    cfg = loopback_config(tmp_path, driver={"kind": "sim", "sim": sim})
    with Service(cfg) as svc:
        deadline = time.monotonic() + 60.0  # only catches a hang
        while svc.driver_state == "running" and time.monotonic() < deadline:
            svc.step(0.01)
        saved = svc.current_map
    assert saved is not None and saved.effective_frame > 0
    cfg = loopback_config(tmp_path, driver={"kind": "sim", "sim": {**sim, "max_frames": 1}})
    with Service(cfg) as svc:
        assert svc.lockstep and svc.current_map.seq == saved.seq
        svc.step(0.01)
        assert svc.driver.last_seq == saved.seq


def _outer_controller(plan, loader, lead_frames=4):
    """Daemon defaults plus the outer loop at the 10 % target (3GPP TS 36.213 sec. 7.2.3:
    the CQI's block error rate; common practice for link adaptation)."""
    ctl = _controller(plan, loader, lead_frames)
    ctl.outer = OuterLoop(**OuterSection(target_fer=0.1).model_dump())
    return ctl


class TestOuterLoopOnDecodedFrames:
    """The outer loop fed by the closed loop's own payload checks (rule of Nakamura, Awad and
    Vadgama, WPMC 2002: up a step per errored frame, down step * T / (1 - T) per good one)
    pulls the frame error rate toward the target from both sides. Frozen 3GPP EVA (TS 36.101
    Annex B.2) at 20 dB, seeded; invented loader errors of 3 dB either way."""

    KW = dict(profile="eva", doppler_hz=0.0, snr_db=20.0, realtime=False, seed=13)

    def _run(self, plan, loader, outer, n=300):
        ctl = (_outer_controller if outer else _controller)(plan, loader)
        with SimDriver(plan=plan, **self.KW) as sim:
            fig = run_closed_loop(sim, n, controller=ctl)
        return fig, ctl

    def _loader(self, plan, margin_db, coding_gain_db):
        ser = frame_ser_target(0.1, plan.data_symbols * plan.data_tones.size)
        return LoadingSection(target_ser=ser, margin_db=margin_db,
                              coding_gain_db=coding_gain_db).loader()

    def test_a_gap_too_optimistic_is_pulled_up_to_the_target(self, plan):
        loader = self._loader(plan, 0.0, 3.0)   # claims a coding gain the uncoded link lacks
        open_fig, _ = self._run(plan, loader, outer=False)
        fig, ctl = self._run(plan, loader, outer=True)
        assert np.mean(~open_fig.delivered[100:]) > 0.5
        fer = float(np.mean(~fig.delivered[100:]))
        assert 0.02 < fer < 0.25
        assert ctl.outer.offset_db(fig.frames / 50.0) > 1.5
        assert ctl.outer.counters["outcomes"] > 250    # every frame with a map was reported

    def test_a_gap_too_pessimistic_is_pulled_down_for_more_goodput(self, plan):
        loader = self._loader(plan, 6.0, 0.0)   # 3 dB more margin than the default 3 dB
        open_fig, _ = self._run(plan, loader, outer=False)
        fig, ctl = self._run(plan, loader, outer=True)
        assert ctl.outer.offset_db(fig.frames / 50.0) < -1.0
        assert fig.goodput_bps > 1.05 * open_fig.goodput_bps


class TestFadingLoop:
    """3GPP EVA with 1 Hz classical Doppler (TS 36.101 Annex B.2; Clarke/Jakes spectrum),
    20 dB, 50 frames/s, seeded: the loop as the bench runs it, small."""

    KW = dict(profile="eva", doppler_hz=1.0, snr_db=20.0, realtime=False, seed=3)

    def _loader(self, plan):
        ser = frame_ser_target(0.1, plan.data_symbols * plan.data_tones.size)
        return LoadingSection(target_ser=ser).loader()

    def test_prediction_cuts_the_errors_of_fading(self, plan):
        """Without an outer loop, loading each tone for its worst predicted SNR over the map's
        life (the default) both loses fewer frames and delivers more than loading the tracked
        SNR (``predict_s`` 0) on the same realisation: the prediction is nearer the SNR the
        frames meet than the tracked SNR's back-off is."""
        loader = self._loader(plan)
        figs = {}
        for horizon_s in (0.0, EstimatorSection().predict_s):
            est = Estimator(**{**EstimatorSection().model_dump(), "predict_s": horizon_s})
            ctl = LinkController(plan, est, ChangeControl(loader, **ChangeSection().model_dump()),
                                 gap_db=loader.gap_db, epoch="test", lead_frames=2)
            with SimDriver(plan=plan, **self.KW) as sim:
                figs[horizon_s] = run_closed_loop(sim, 150, controller=ctl)
        plain, predicted = figs[0.0], figs[EstimatorSection().predict_s]
        assert predicted.frame_error_rate < 0.75 * plain.frame_error_rate
        assert predicted.goodput_bps > 1.1 * plain.goodput_bps

    def test_acks_bring_the_lead_down_to_what_the_transmitter_meets(self, plan):
        """The closed loop's transmitter applies a map from the frame after it was made: the
        acknowledgements take the lead from the configured 4 frames to 1, none late."""
        ctl = _controller(plan, self._loader(plan), lead_frames=4)
        with SimDriver(plan=plan, **self.KW) as sim:
            run_closed_loop(sim, 100, controller=ctl)
        assert ctl.lead_in_use == 1 and ctl.acks_late == 0

    def test_the_loop_beats_a_slow_loop_on_a_fading_channel(self, plan):
        """A slow setting (long downshift persistence and upgrade dwell, no lookahead) on the
        same realisation delivers clearly less. Change control alone: both estimators without
        the channel prediction, which makes up for much of a slow setting's lag."""
        loader = self._loader(plan)
        plain = {**EstimatorSection().model_dump(), "predict_s": 0.0}
        fast_ctl = LinkController(plan, Estimator(**plain),
                                  ChangeControl(loader, **ChangeSection().model_dump()),
                                  gap_db=loader.gap_db, epoch="test", lead_frames=2)
        with SimDriver(plan=plan, **self.KW) as sim:
            fast = run_closed_loop(sim, 150, controller=fast_ctl)
        est = Estimator(**plain)
        slow_cc = ChangeControl(loader, **{**ChangeSection().model_dump(), "down_persist_s": 0.3,
                                           "up_dwell_s": 3.0, "lookahead_s": 0.0})
        slow = LinkController(plan, est, slow_cc, gap_db=loader.gap_db, epoch="test",
                              lead_frames=4)
        with SimDriver(plan=plan, **self.KW) as sim:
            slow_fig = run_closed_loop(sim, 150, controller=slow)
        assert fast.goodput_bps > 1.2 * slow_fig.goodput_bps
