"""The supervised radio driver on a stand-in device (tests/radio_fakes.py): same estimates as
the simulator for the same IQ, every injected fault survived and counted, buffers changed only
by destroy-and-recreate, and no map made from stale estimates while the radio is away."""

from __future__ import annotations

import socket
import warnings

import numpy as np
import pytest
import sigmf
from _service_fakes import loopback_config
from protocol_helpers import until
from radio_fakes import FakeAir

from brimline.daemon.errors import ConfigError, SourceError
from brimline.daemon.runtime.service import Service
from brimline.daemon.runtime.status import driver_fields
from brimline.daemon.wire.sigmf import CaptureWriter, read_sigmf
from brimline.drivers.link.frame import Transmitter, make_plan, map_arrays
from brimline.drivers.sources.radio import RadioDriver, device_versions
from brimline.drivers.sources.sim import SimDriver

PLAN = make_plan(center_hz=915e6)
FAST = dict(backoff_s=0.001, backoff_max_s=0.004)


def _periodic_stream(n_frames: int, gap: int, snr_db: float = 30.0, seed: int = 3):
    """Default-map frames with counters 0..n-1, each followed by ``gap`` samples, in AWGN
    (invented test signal). Returns the stream and the frame period."""
    rng = np.random.default_rng(seed)
    seq, bits, power = map_arrays(PLAN, None, 2)
    tx = Transmitter(PLAN)
    pieces = []
    for i in range(n_frames):
        sent = tx.frame(bits=bits, power_lin=power, map_seq=seq, counter=i, rng=rng)
        pieces.append(np.concatenate([sent.samples, np.zeros(gap, np.complex64)]))
    x = np.concatenate(pieces) * 0.1
    sigma = 0.1 * 10 ** (-snr_db / 20) / np.sqrt(2)
    x = x + sigma * (rng.standard_normal(x.size) + 1j * rng.standard_normal(x.size))
    return x.astype(np.complex64), PLAN.frame_len + gap


def _take(driver, n):
    out = []
    for est in driver.frames():
        out.append(est)
        if len(out) >= n:
            break
    return out


class TestSameAsSimulator:
    def test_estimates_equal_the_sim_drivers_for_the_same_iq(self):
        """The simulator receives each frame block alone; the radio path finds the same frames
        in buffers of a continuous stream (same DSP, same samples). The first frame sits at the
        same place in both search windows and its estimate is identical; later frames are
        searched from the previous frame's end, where the timing may settle elsewhere inside
        the cyclic prefix, so they agree within estimation noise (0.5 dB on the band mean)."""
        plan = PLAN
        kw = dict(plan=plan, realtime=False, profile="awgn", snr_db=25.0, cfo_hz=800.0,
                  lead_max_samples=0, seed=11, default_bits=2)
        sim_ests = list(SimDriver(max_frames=6, **kw).frames())
        stream = SimDriver(**kw).capture(6, gap_samples=plan.symbol_len)
        # Scaled by a power of two (exact) below the radio's clip level of full scale.
        stream = np.concatenate([stream, np.zeros(4 * plan.frame_len, np.complex64)]) * 0.125
        air = FakeAir(stream)
        with RadioDriver(plan=plan, buffer_frames=2, open_device=air, **FAST) as drv:
            radio_ests = _take(drv, 6)
        assert len(radio_ests) == len(sim_ests) == 6
        np.testing.assert_array_equal(radio_ests[0].snr_db, sim_ests[0].snr_db)
        np.testing.assert_allclose(8 * radio_ests[0].channel, sim_ests[0].channel, rtol=1e-5)
        for a, b in zip(sim_ests, radio_ests):
            assert b.valid and b.header_ok and b.map_seq_seen == a.map_seq_seen
            assert b.plan_id == a.plan_id and np.array_equal(b.tone_index, a.tone_index)
            assert abs(float(np.mean(b.snr_db)) - float(np.mean(a.snr_db))) < 0.5
        assert drv.counters["lost_frames"] == 0 and drv.counters["frames"] == 6


class TestFaults:
    def test_receive_timeout_reopens_and_goes_on(self):
        stream, _ = _periodic_stream(60, gap=500)
        air = FakeAir(stream, timeouts={3})
        with RadioDriver(plan=PLAN, open_device=air, **FAST) as drv:
            ests = _take(drv, 20)
            assert drv.state == "running"
        assert drv.counters["timeouts"] == 1 and drv.counters["reconnects"] == 1
        assert air.opened == 2 and ests[-1].valid
        assert ("tx_destroy_buffer",) in air.calls  # the whole device was torn down

    def test_device_that_vanishes_is_retried_with_backoff(self):
        stream, _ = _periodic_stream(60, gap=500)
        air = FakeAir(stream, errors={2}, vanish_opens=3)
        with RadioDriver(plan=PLAN, open_device=air, **FAST) as drv:
            ests = _take(drv, 15)
        assert drv.counters["device_errors"] == 1
        assert drv.counters["reconnect_failures"] == 3 and drv.counters["reconnects"] == 1
        assert len(ests) == 15

    def test_gives_up_after_max_attempts(self):
        stream, _ = _periodic_stream(20, gap=500)
        air = FakeAir(stream, errors={1}, vanish_opens=100)
        with RadioDriver(plan=PLAN, open_device=air, max_attempts=2, **FAST) as drv:
            with pytest.raises(SourceError, match=r"driver.radio.uri=ip:192.168.2.1: device "
                                                  r"gone after 2 attempts"):
                _take(drv, 50)
            assert drv.state == "failed"

    def test_overflow_gap_is_counted_and_the_spliced_frame_is_invalid(self):
        """Samples lost between two buffers: the header counters show the lost frames, the gap
        lies at a buffer boundary (a suspected overflow), and a frame spliced across it is
        marked invalid."""
        gap = 700
        stream, period = _periodic_stream(80, gap=gap)
        buf = 2 * PLAN.frame_len
        # A boundary inside a frame: buffer k ends within frame i.
        k = next(k for k in range(1, 40)
                 if (k * buf) % period not in range(PLAN.frame_len, period)
                 and (k * buf) % period > PLAN.frame_len // 2)
        air = FakeAir(stream, skips={k - 1: 3})
        with RadioDriver(plan=PLAN, buffer_frames=2, open_device=air, **FAST) as drv:
            ests = _take(drv, 40)
        c = drv.counters
        assert c["lost_frames"] >= 1 and c["suspected_overflows"] == 1
        assert c["damaged_frames"] + c["crc_failed"] >= 1
        good = [e for e in ests if e.valid and e.header_ok]
        median = np.median([np.median(e.snr_db) for e in good])
        assert all(abs(np.median(e.snr_db) - median) < 3.0 for e in good)
        assert any(not e.valid for e in ests) or c["crc_failed"] >= 1

    def test_malformed_reply_is_counted_and_dropped(self):
        stream, _ = _periodic_stream(40, gap=500)
        air = FakeAir(stream, bad={1, 2})
        with RadioDriver(plan=PLAN, open_device=air, **FAST) as drv:
            ests = _take(drv, 10)
        assert drv.counters["bad_buffers"] == 2 and len(ests) == 10


def _clock_stream(n_frames: int, gap: int, ppm: float):
    """The periodic stream as a receiver whose sample clock runs ``ppm`` fast samples it: at
    transmitter sample times n / (1 + ppm 1e-6), linearly interpolated (the definition of a
    clock offset in ppm; the same resampling as the emulated radio's)."""
    x, period = _periodic_stream(n_frames, gap)
    at = np.arange(int(x.size * (1 + ppm * 1e-6)) - 2) / (1 + ppm * 1e-6)
    grid = np.arange(x.size)
    y = np.interp(at, grid, x.real) + 1j * np.interp(at, grid, x.imag)
    return y.astype(np.complex64), period


class TestSampleClockOffset:
    """driver.clock_offset_ppm from frame starts against counters x slot (drivers/link/clock)."""

    def test_offset_of_a_fast_receiver_clock_is_measured(self):
        stream, period = _clock_stream(60, gap=4000, ppm=200.0)
        rate_hz = PLAN.sample_rate_hz / period  # the slot is exactly `period` samples
        with RadioDriver(plan=PLAN, open_device=FakeAir(stream), frame_rate_hz=rate_hz,
                         **FAST) as drv:
            assert drv.clock_offset_ppm is None  # nothing received yet
            _take(drv, 40)
            # 200 ppm of an 8608-sample slot is 1.7 samples per slot; start positions come in
            # whole samples, so a tolerance of 10 % over 40 frames is generous
            assert drv.clock_offset_ppm == pytest.approx(200.0, abs=20.0)

    def test_no_offset_without_the_frame_rate(self):
        stream, _ = _clock_stream(30, gap=4000, ppm=200.0)
        with RadioDriver(plan=PLAN, open_device=FakeAir(stream), **FAST) as drv:
            _take(drv, 20)
            assert drv.slot_samples is None and drv.clock_offset_ppm is None

    def test_lost_samples_do_not_bend_the_fit(self):
        """Buffers lost in an overflow: the positions skip what was lost, the fit starts again
        after it, and the offset after it is still the clock's (here none)."""
        stream, period = _periodic_stream(80, gap=700)
        air = FakeAir(stream, skips={5: 3})
        with RadioDriver(plan=PLAN, buffer_frames=2, open_device=air,
                         frame_rate_hz=PLAN.sample_rate_hz / period, **FAST) as drv:
            _take(drv, 50)
            assert drv.counters["suspected_overflows"] == 1
            assert drv.clock_offset_ppm == pytest.approx(0.0, abs=20.0)

    @pytest.mark.parametrize("clock_ppm", [50.0, 0.0])
    def test_the_emulated_radios_clock_fault_shows_in_the_status(self, clock_ppm):
        """The emulated radio's clock_ppm knob (its receiver samples at fs (1 + ppm 1e-6)) in
        the single-radio loopback through the daemon: the status's driver.clock_offset_ppm
        shows it; without the knob it is near 0. Generous tolerance: start positions come in
        whole samples (50 ppm of the 9600-sample slot is half a sample per slot), and the
        emulated air's timing is not exact."""
        cfg = loopback_config(
            link={"center_hz": 2.4e9, "sample_rate_hz": 480000.0},
            driver={"kind": "radio", "radio": {"backend": "emulated", "uri": "emulated:rx",
                                               "transmit": True, "backoff_s": 0.01}},
            emulated={"air_endpoint": _free_endpoint(), "path_gain_db": 22.0,
                      "clock_ppm": clock_ppm})
        with Service(cfg) as svc:
            svc.start()
            assert until(lambda: (svc.step(0.01) or True)
                         and svc.driver.counters["frames"] >= 80
                         and svc.driver.clock_offset_ppm is not None, 120)
            st = svc.publish_status()
        shown = st["driver"]["clock_offset_ppm"]
        assert shown == pytest.approx(clock_ppm, abs=15.0), st["driver"]

    def test_the_transmitters_frame_rate_gives_the_status_its_data_rate(self):
        """With ``frame_rate_hz`` known, the radio's status carries the data rate (bits per data
        symbol x data symbols per frame x frames per second), as the simulator's does."""
        with RadioDriver(plan=PLAN, open_device=FakeAir(np.zeros(4)), frame_rate_hz=25.0) as drv:
            fields = driver_fields(drv, "running", None)
        assert fields["frame_rate_hz"] == 25.0
        with RadioDriver(plan=PLAN, open_device=FakeAir(np.zeros(4))) as drv:
            assert driver_fields(drv, "running", None)["frame_rate_hz"] is None

    def test_a_frame_rate_that_leaves_no_room_for_a_frame_is_refused(self):
        with pytest.raises(ConfigError, match=r"driver.radio.frame_rate_hz=10000.0: frames "
                                              r"last 1.200 ms, so at most 833.3 frames"):
            RadioDriver(plan=PLAN, open_device=FakeAir(np.zeros(4)), frame_rate_hz=10000.0)


class TestStartAndSettings:
    def test_no_device_at_the_uri_is_one_line_naming_it(self):
        air = FakeAir(np.zeros(10), absent=True)
        with pytest.raises(SourceError, match=r"^driver.radio.uri=ip:192.0.2.9: no device "
                                              r"answers: ConnectionRefusedError"):
            RadioDriver(plan=PLAN, uri="ip:192.0.2.9", open_device=air)

    def test_buffer_size_is_set_only_after_a_destroy(self):
        stream, _ = _periodic_stream(40, gap=500)
        air = FakeAir(stream, timeouts={2})
        with RadioDriver(plan=PLAN, open_device=air, transmit=True, **FAST) as drv:
            _take(drv, 10)
        live = False
        for call in air.calls:
            if call[0] == "create_rx_buffer":
                live = True
            elif call[0] == "rx_destroy_buffer":
                live = False
            elif call[:2] == ("set", "rx_buffer_size"):
                assert not live, "buffer size written while a buffer exists"
        sizes = [c[2] for c in air.calls if c[:2] == ("set", "rx_buffer_size")]
        assert sizes == [4 * PLAN.frame_len] * 2

    def test_versions_and_timeout_reach_the_device(self):
        stream, _ = _periodic_stream(10, gap=500)
        air = FakeAir(stream)
        with RadioDriver(plan=PLAN, open_device=air, rx_timeout_s=0.25) as drv:
            assert drv.versions["hw_model"] == "Bench stand-in Rev.Z"
            assert drv.versions["backend"] == "0.99 (t3st)"
            assert drv._device._ctx.timeout_ms == 250

    def test_versions_never_raise(self):
        class Hostile:
            @property
            def _ctx(self):
                raise RuntimeError("device said no")
        assert "error" in device_versions(Hostile())

    @pytest.mark.parametrize("key,value,msg", [
        ("rx_timeout_s", 0.0, r"driver.radio.rx_timeout_s=0.0 must be in \[0.001, 60\]"),
        ("backoff_s", -1.0, r"driver.radio.backoff_s=-1.0 must be a positive"),
        ("max_attempts", -1, r"driver.radio.max_attempts=-1 must be a finite number >= 0"),
        ("backoff_max_s", 0.1, r"driver.radio.backoff_max_s=0.1 must be >= "),
    ])
    def test_bad_settings(self, key, value, msg):
        with pytest.raises(ConfigError, match=msg):
            RadioDriver(plan=PLAN, open_device=FakeAir(np.zeros(4)), **{key: value})


class TestInTheService:
    def test_fault_shows_in_status_and_no_map_comes_from_stale_estimates(self):
        """The device vanishes: the status says reconnecting with the counts, the daemon falls
        back (only the fallback map is published while the radio is away), and after the
        device returns estimates flow again."""
        stream, _ = _periodic_stream(400, gap=300)
        air = FakeAir(stream, errors={30}, vanish_opens=10 ** 6)
        cfg = loopback_config(link={"center_hz": 915e6},
                              fallback={"stale_after_s": 0.2, "bits": 2})
        drv = RadioDriver(plan=make_plan(**cfg.link.model_dump()), open_device=air,
                          backoff_s=0.01, backoff_max_s=0.02)
        with Service(cfg, driver=drv) as svc:
            assert until(lambda: (svc.step(0.01) or True) and drv.state == "reconnecting", 30)
            mark = svc.controller.current_map
            assert until(lambda: (svc.step(0.01) or True) and svc.current_map is not None
                         and svc.current_map.fallback, 30)
            st = svc.publish_status()
            assert st["driver"]["state"] == "reconnecting"
            assert "driver_reconnecting" in st["alarms"] and "fallback" in st["alarms"]
            assert st["driver"]["counters"]["device_errors"] == 1
            # Away: any map published since the fault is the fallback map.
            for _ in range(20):
                svc.step(0.01)
                m = svc.current_map
                assert m is mark or m.fallback
            air.vanish_opens = 0  # the device is back
            accepted = svc.status()["frames"]["accepted"]
            assert until(lambda: (svc.step(0.01) or True) and drv.state == "running"
                         and svc.status()["frames"]["accepted"] > accepted, 30)
            st = svc.publish_status()
            assert st["driver"]["counters"]["reconnects"] == 1
            assert st["driver"]["state"] == "running"


def _library_open(path):
    """The capture as the sigmf package reads it: its checksum check and its validator, with
    any warning (an undeclared extension namespace, for one) an error."""
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        handle = sigmf.fromfile(str(path) + ".sigmf-meta")  # skip_checksum=False: sha512
        handle.validate()
    return handle


def _free_endpoint() -> str:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return f"tcp://127.0.0.1:{s.getsockname()[1]}"


class TestIqCapture:
    """record.iq from the radio: every good receive buffer copied, through the same feed as
    the recorded-IQ source, with a capture segment where the stream broke."""

    def _capture(self, tmp_path, air, n, **settings):
        with CaptureWriter(tmp_path / "cap", sample_rate_hz=PLAN.sample_rate_hz, plan=PLAN,
                           center_hz=PLAN.center_hz) as w:
            with RadioDriver(plan=PLAN, open_device=air, capture=w, **FAST, **settings) as drv:
                _take(drv, n)
        _library_open(tmp_path / "cap")
        return read_sigmf(tmp_path / "cap"), drv

    def test_buffers_are_copied_in_order_and_scaled_to_full_scale(self, tmp_path):
        stream, _ = _periodic_stream(40, gap=500)
        air = FakeAir(stream)
        rec, drv = self._capture(tmp_path, air, 10)
        assert [s.reason for s in rec.segments] == ["start"]
        # Everything served was copied (the last buffer when the source stopped), as the
        # driver scaled it: converter counts / 2048 (tests/radio_fakes.py serves stream * 2048).
        assert rec.n_samples == air.served * 4 * PLAN.frame_len
        served = (stream[:rec.n_samples] * 2048.0).astype(np.complex64) / np.float32(2048)
        np.testing.assert_array_equal(rec.samples(0, rec.n_samples), served)

    def test_an_overflow_starts_a_segment_at_the_boundary_where_samples_were_lost(self,
                                                                                 tmp_path):
        gap = 700
        stream, _ = _periodic_stream(80, gap=gap)
        buf = 2 * PLAN.frame_len
        air = FakeAir(stream, skips={4: 3})  # three buffers lost after buffer 4
        rec, drv = self._capture(tmp_path, air, 40, buffer_frames=2)
        assert drv.counters["suspected_overflows"] == 1
        assert [(s.sample_start, s.reason) for s in rec.segments] == [(0, "start"),
                                                                       (5 * buf, "overflow")]
        # The lost count is not known from frame counters: the segment states none.
        assert rec.segments[1].global_index == 5 * buf

    def test_a_reconnect_and_a_malformed_buffer_start_gap_segments(self, tmp_path):
        stream, _ = _periodic_stream(60, gap=500)
        buf = 4 * PLAN.frame_len
        air = FakeAir(stream, bad={1}, timeouts={4})
        rec, drv = self._capture(tmp_path, air, 12)
        assert drv.counters["reconnects"] == 1 and drv.counters["bad_buffers"] == 1
        # buffers 0, 2, 3 before the timeout at 4, then the reopened device's stream
        assert [(s.sample_start, s.reason) for s in rec.segments] == [
            (0, "start"), (buf, "gap"), (3 * buf, "gap")]

    def test_the_daemon_captures_the_emulated_radio(self, tmp_path):
        """record.iq with driver.kind radio on the emulated backend (its own cyclic transmitter
        on the emulated air, a receive timeout every 12th buffer): the capture passes the
        sigmf package's validation and has one segment per stream, each after a reconnect
        marked as a gap."""
        cfg = loopback_config(
            link={"center_hz": 2.4e9, "sample_rate_hz": 480000.0},
            driver={"kind": "radio", "radio": {"backend": "emulated", "uri": "emulated:rx",
                                               "transmit": True, "backoff_s": 0.01}},
            emulated={"air_endpoint": _free_endpoint(), "path_gain_db": 22.0,
                      "rx_timeout_every": 12},
            record={"iq": {"path": str(tmp_path / "live")}})
        with Service(cfg) as svc:
            svc.start()
            assert until(lambda: (svc.step(0.01) or True)
                         and svc.driver.counters["reconnects"] >= 2, 120)
            counters = dict(svc.driver.counters)
        _library_open(tmp_path / "live")
        rec = read_sigmf(tmp_path / "live")
        buf = 4 * make_plan(**cfg.link.model_dump()).frame_len
        assert rec.n_samples > 0 and rec.n_samples % buf == 0
        reasons = [s.reason for s in rec.segments]
        assert reasons[0] == "start" and set(reasons[1:]) == {"gap"}
        assert len(reasons) - 1 >= 2 and len(reasons) - 1 <= counters["reconnects"] + 1


@pytest.mark.hardware
def test_live_radio_after_a_buffer_rebuild():
    """With a radio attached (pyadi-iio and a device at the default URI, a transmitter on air):
    the versions are read, and estimates come after the buffer is destroyed and recreated."""
    pytest.importorskip("adi")
    with RadioDriver(plan=make_plan(center_hz=2.4e9)) as drv:
        assert drv.versions
        drv.rebuild_buffers(drv._device)
        assert len(_take(drv, 2)) == 2
