"""brimline tx: the map schedule, the power bound, the transmitter loop (maps switch at the named
frame, power bounded whatever arrives, hold then safe or silent on heartbeat loss), the sinks and
the command (silence on exit, SIGTERM, SIGINT and an error).

Real sockets on 127.0.0.1 with free ports; time from a fake clock; no wall-clock asserts (the
deadlines only catch a hang).
"""

from __future__ import annotations

import json
import math
import os
import re
import signal
import subprocess
import sys
import textwrap
import threading
from pathlib import Path

import numpy as np
import pytest
import zmq
from hypothesis import given, settings
from hypothesis import strategies as st
from protocol_helpers import ANY_PORT, FakeClock, until

from brimline.daemon.commands.cli import main
from brimline.daemon.errors import SinkError
from brimline.daemon.net.follower import Follower
from brimline.daemon.net.publisher import MapPublisher
from brimline.daemon.records import LoadMap
from brimline.daemon.runtime.assemble import build_tx, open_sink
from brimline.daemon.runtime.config import load_config
from brimline.daemon.runtime.transmitter import TxLoop, TxState
from brimline.drivers.devices.emulated import MAX_ATTENUATION_DB
from brimline.drivers.link.frame import make_plan
from brimline.drivers.link.receiver import FrameScanner, Receiver
from brimline.drivers.link.schedule import MapSchedule, PowerBound
from brimline.drivers.sinks.base import Sink
from brimline.drivers.sinks.radio import RadioSink
from brimline.drivers.sinks.sigmf import SigmfSink
from brimline.drivers.sinks.stream import IqStreamSink
from brimline.drivers.sources.iq import read_sigmf

ROOT = Path(__file__).resolve().parents[1]
# A small plan keeps the DSP quick: 128-point FFT, 64 used tones, 4 data symbols.
PLAN = make_plan(fft_size=128, cp_len=16, sample_rate_hz=1.92e6, used_tones_half=40,
                 pilot_spacing=8, data_symbols=4, center_hz=2.4e9)
N = PLAN.data_tones.size
RATE_HZ = 400.0  # a slot of 4800 samples holds one 2304-sample frame and a gap


def plan_map(seq: int, effective_frame: int, *, bits: int = 2, power: float = 1.0,
             epoch: str = "e1", power_lin=None) -> LoadMap:
    """A map for PLAN: every data tone ``bits`` bits at ``power`` (or ``power_lin``)."""
    b = np.full(N, bits)
    p = np.where(b > 0, power, 0.0) if power_lin is None else np.asarray(power_lin, float)
    return LoadMap(epoch=epoch, seq=seq, effective_frame=effective_frame, created_s=0.0,
                   plan_id=PLAN.plan_id, tone_index=PLAN.data_tones, bits=b, power_lin=p,
                   total_bits=int(b.sum()), margin_db=3.0, gap_db=9.8, reason="test")


class ListSink(Sink):
    """A test sink: keeps every slot and every silence call in order."""

    name = "list"

    def __init__(self):
        super().__init__()
        self.slots: list[np.ndarray] = []
        self.events: list[str] = []

    def _send(self, samples):
        self.slots.append(samples.copy())
        self.events.append("send")

    def _silence(self):
        self.events.append("silence")


class FakeDevice:
    """Records what a pyadi-iio device object is given, in order (no hardware)."""

    def __init__(self, fail_tx: int = 0):
        self.calls: list[tuple] = []
        self.fail_tx = fail_tx
        self.buffer = False

    def __setattr__(self, name, value):
        if name not in ("calls", "fail_tx", "buffer"):
            self.calls.append(("set", name, value))
        object.__setattr__(self, name, value)

    def tx(self, data):
        if self.fail_tx:  # the next fail_tx calls fail
            self.fail_tx -= 1
            raise OSError(5, "I/O error")
        self.calls.append(("tx", np.asarray(data).copy()))
        self.buffer = True

    def tx_destroy_buffer(self):
        self.calls.append(("tx_destroy_buffer",))
        self.buffer = False


def decode_slots(slots) -> list[tuple[int, int]]:
    """(map_seq, counter) of every frame the project's receiver finds in the slots."""
    rx = Receiver(PLAN, default_bits=2)
    out = []
    for slot in slots:
        res = rx.receive(slot * 4.0, demodulate=False)
        assert res.header_ok, res.reason
        out.append((res.map_seq, res.counter))
    return out


@pytest.fixture
def pub(ctx):
    with MapPublisher(map_endpoint=ANY_PORT, snapshot_endpoint=ANY_PORT, ack_endpoint=ANY_PORT,
                      heartbeat_s=0.05, linger_s=0.0, context=ctx, epoch="e1") as p:
        yield p


def make_loop(pub, ctx, sink, clock, **kw):
    follower = Follower(plan=PLAN, map_endpoint=pub.map_endpoint,
                        snapshot_endpoint=pub.snapshot_endpoint,
                        ack_endpoint=pub.ack_endpoint, bits=kw.pop("bits", range(0, 9)),
                        budget_db=kw.pop("budget_db", 0.0), cap_db=kw.pop("cap_db", 0.0),
                        heartbeat_timeout_s=1.0, context=ctx, clock=clock)
    kw.setdefault("frame_rate_hz", RATE_HZ)
    return TxLoop(plan=PLAN, follower=follower, sink=sink, clock=clock, **kw)


def subscribed(pub, loop, clock):
    """Until the loop's follower hears the publisher (heartbeats) and is synced."""
    f = loop.follower
    assert until(lambda: f.synced and f.counters["heartbeats"] > 0,
                 step=lambda: (pub.heartbeat(clock()), pub.handle_snapshot(), f.poll(0.005)))


# --------------------------------------------------------------------------- pure rules


class TestMapSchedule:
    def test_map_in_force_from_its_frame(self):
        s = MapSchedule()
        s.schedule(plan_map(1, 5), next_frame=0)
        seen = [s.at(k) for k in range(8)]
        assert [m is None for m, _ in seen[:5]] == [True] * 5
        assert [m.seq for m, _ in seen[5:]] == [1, 1, 1]
        assert [changed for _, changed in seen] == [False] * 5 + [True, False, False]

    def test_late_map_from_the_next_frame(self):
        s = MapSchedule()
        s.at(10)
        s.schedule(plan_map(1, 3), next_frame=11)
        assert s.counters["late"] == 1
        assert s.at(11)[0].seq == 1

    def test_newer_map_for_an_earlier_frame_supersedes(self):
        s = MapSchedule()
        s.schedule(plan_map(1, 20), next_frame=0)
        s.schedule(plan_map(2, 10), next_frame=0)
        assert s.counters["superseded"] == 1
        assert s.at(15)[0].seq == 2 and s.at(25)[0].seq == 2

    def test_two_pending_take_effect_in_turn(self):
        s = MapSchedule()
        s.schedule(plan_map(1, 5), next_frame=0)
        s.schedule(plan_map(2, 8), next_frame=0)
        assert [getattr(s.at(k)[0], "seq", None) for k in (4, 5, 7, 8)] == [None, 1, 1, 2]


class TestPowerBound:
    def test_within_bound_unchanged(self):
        p = np.full(N, 0.5)
        out = PowerBound(N)(p)
        assert not out.clipped and np.array_equal(out.power_lin, p)

    def test_tone_cut_and_total_scaled(self):
        out = PowerBound(N, max_tone_db=3.0, max_total_db=0.0)(np.r_[100.0, np.ones(N - 1)])
        assert out.tones_cut == 1 and out.scaled
        assert out.power_lin.sum() == pytest.approx(N)

    def test_nan_and_negative_are_off(self):
        out = PowerBound(N)(np.r_[np.nan, -1.0, np.ones(N - 2)])
        assert out.power_lin[0] == 0 and out.power_lin[1] == 0

    def test_non_finite_bound_refused(self):
        with pytest.raises(ValueError, match=r"tx.max_tone_db=nan must be finite"):
            PowerBound(N, max_tone_db=math.nan)

    @settings(max_examples=60, deadline=None)
    @given(st.lists(st.floats(allow_nan=True, allow_infinity=True, width=32), min_size=N,
                    max_size=N),
           st.floats(-20, 10), st.floats(-20, 10))
    def test_never_above_the_bound(self, power, tone_db, total_db):
        """Invariant: whatever the map, no tone above max_tone_db, total within max_total_db."""
        out = PowerBound(N, max_tone_db=tone_db, max_total_db=total_db)(np.array(power))
        assert np.all(np.isfinite(out.power_lin)) and np.all(out.power_lin >= 0)
        assert out.power_lin.max() <= 10 ** (tone_db / 10) * (1 + 1e-12)
        assert out.power_lin.sum() <= N * 10 ** (total_db / 10) * (1 + 1e-9)


# --------------------------------------------------------------------------- the loop


def test_maps_switch_exactly_at_the_named_frame(pub, ctx):
    """Frames before effective_frame carry the old map's seq in their header, from it the new
    one (headers decoded by the project's receiver); each switch is acknowledged with its frame."""
    clock, sink = FakeClock(), ListSink()
    with make_loop(pub, ctx, sink, clock) as loop:
        subscribed(pub, loop, clock)
        pub.publish(plan_map(0, 4))
        pub.publish(plan_map(1, 9, bits=4))
        assert until(lambda: loop.follower.current is not None and
                     loop.follower.current.seq == 1, step=lambda: loop.follower.poll(0.005))
        for _ in range(12):
            loop.step()
        assert decode_slots(sink.slots) == [(-1, k) for k in range(4)] + \
            [(0, k) for k in range(4, 9)] + [(1, k) for k in range(9, 12)]
        acks = []
        assert until(lambda: len(acks) >= 2, step=lambda: acks.extend(pub.poll_acks()))
        assert [(a["seq"], a["frame"]) for a in acks] == [(0, 4), (1, 9)]
        assert loop.counters["maps_applied"] == 2


def test_sigmf_sink_frames_read_back_by_the_receiver(tmp_path, pub, ctx):
    """The SigMF sink's file, read by the project's reader (ci16, full scale 32768) and scanned
    by the receiver, holds the frames in order with the map switch at the named frame."""
    clock = FakeClock()
    sink = SigmfSink(tmp_path / "tx", sample_rate_hz=PLAN.sample_rate_hz, center_hz=2.4e9)
    with make_loop(pub, ctx, sink, clock, backoff_db=12.0) as loop:
        subscribed(pub, loop, clock)
        pub.publish(plan_map(3, 2))
        assert until(lambda: loop.follower.current is not None,
                     step=lambda: loop.follower.poll(0.005))
        for _ in range(5):
            loop.step()
    rec = read_sigmf(tmp_path / "tx")
    assert rec.datatype == "ci16_le" and rec.n_samples == 5 * loop.slot_len
    scanner = FrameScanner(Receiver(PLAN, default_bits=2))
    found = [(r.map_seq, r.counter) for _, r in scanner.feed(rec.samples(0, rec.n_samples) * 4,
                                                             final=True) if r.header_ok]
    assert found == [(-1, 0), (-1, 1), (3, 2), (3, 3), (3, 4)]


def test_hostile_publisher_cannot_push_power_above_the_bound(pub, ctx):
    """Maps that the follower's loading check admits (a generous 20 dB budget) but that exceed
    the transmitter's own bound are cut to it; negative-power and over-cap maps are refused outright. Every
    slot stays within full scale and its RMS within the backoff level of a nominal frame."""
    clock, sink = FakeClock(), ListSink()
    with make_loop(pub, ctx, sink, clock, budget_db=20.0, cap_db=20.0, backoff_db=12.0,
                   max_tone_db=0.0, max_total_db=0.0) as loop:
        subscribed(pub, loop, clock)
        hostile = [
            plan_map(0, 0, power=50.0),                                 # admitted, 17 dB over
            plan_map(1, 2, power_lin=np.r_[90.0, np.full(N - 1, 1.0)]),  # one tone far over
            plan_map(2, 4, power_lin=np.r_[-5.0, np.ones(N - 1)]),      # refused
            plan_map(3, 6, power=1000.0),                               # refused (over cap)
            plan_map(4, 8, bits=8, power=60.0),                         # admitted
        ]
        for m in hostile:
            pub.publish(m)
        assert until(lambda: loop.follower.counters["maps"] + loop.follower.counters[
            "rejected"] >= 5, step=lambda: loop.follower.poll(0.005))
        for _ in range(10):
            loop.step()
        assert loop.follower.counters["rejected"] == 2
        assert loop.counters["power_clipped"] == 10
    # The bound holds the mean tone power at nominal; one frame's random QAM payload moves its
    # RMS by a few per cent, a 17 dB excess would be seven times the level.
    level = 10 ** (-12.0 / 20)
    frames = np.array([slot[:PLAN.frame_len] for slot in sink.slots])
    assert np.abs(np.array(sink.slots)).max() <= 1.0 + 1e-6
    assert np.sqrt(np.mean(np.abs(frames) ** 2, axis=1)).max() <= level * 1.1
    assert np.sqrt(np.mean(np.abs(frames) ** 2)) <= level * 1.03


def test_heartbeat_loss_holds_then_sends_the_safe_map(pub, ctx):
    """No heartbeat: the last good map stays for hold_s, then the default (safe) map is sent;
    a heartbeat again brings the follower's map back (fake clock)."""
    clock, sink = FakeClock(), ListSink()
    with make_loop(pub, ctx, sink, clock, hold_s=3.0, on_loss="safe") as loop:
        subscribed(pub, loop, clock)
        pub.publish(plan_map(0, 0))
        assert until(lambda: loop.follower.current is not None,
                     step=lambda: loop.follower.poll(0.005))
        loop.step()
        assert loop.state is TxState.FOLLOWING and loop.in_force.seq == 0
        clock.t += 1.5  # past the follower's 1 s heartbeat timeout: hold
        loop.step()
        assert loop.state is TxState.HOLDING and loop.in_force.seq == 0
        clock.t += 2.9
        loop.step()
        assert loop.state is TxState.HOLDING
        clock.t += 0.2  # 3.1 s after the loss was seen
        loop.step()
        assert loop.state is TxState.SAFE and loop.in_force is None
        assert decode_slots(sink.slots)[-1] == (-1, 3)
        assert until(lambda: not loop.follower.stale(clock()),
                     step=lambda: (pub.heartbeat(clock()), loop.follower.poll(0.005)))
        loop.step()
        assert loop.state is TxState.FOLLOWING and loop.in_force.seq == 0
        assert loop.counters["heartbeat_losses"] == 1 and loop.counters["recoveries"] == 1


def test_heartbeat_loss_then_silence(pub, ctx):
    clock, sink = FakeClock(), ListSink()
    with make_loop(pub, ctx, sink, clock, hold_s=0.5, on_loss="silent") as loop:
        subscribed(pub, loop, clock)
        assert loop.step()
        clock.t += 1.2
        assert loop.step() and loop.state is TxState.HOLDING
        clock.t += 0.6
        assert not loop.step() and loop.state is TxState.SILENT
        assert not loop.step()
        assert sink.events == ["send", "send", "silence"]


def test_status_is_published(pub, ctx):
    from brimline.daemon.net.publisher import StatusPublisher
    from brimline.daemon.wire import codec

    clock, sink = FakeClock(), ListSink()
    status = StatusPublisher(endpoint=ANY_PORT, rate_hz=1000.0, context=ctx)
    sub = ctx.socket(zmq.SUB)
    sub.setsockopt(zmq.LINGER, 0)
    sub.setsockopt(zmq.SUBSCRIBE, b"")
    sub.connect(status.endpoint)
    got = []

    def step():
        clock.t += 0.01
        loop.step()
        while sub.poll(5):
            got.append(codec.decode(sub.recv_multipart())[1])

    with make_loop(pub, ctx, sink, clock, status=status) as loop:
        assert until(lambda: got, step=step)
    sub.close()
    assert got[-1]["type"] == "tx_status" and got[-1]["state"] == "following"
    assert {"map_seq", "frames_sent", "underruns", "maps_applied"} <= set(got[-1])


def test_close_silences_and_refuses_later_steps(pub, ctx):
    clock, sink = FakeClock(), ListSink()
    loop = make_loop(pub, ctx, sink, clock)
    loop.step()
    loop.close()
    loop.close()
    assert sink.events == ["send", "silence"] and sink.closed
    with pytest.raises(RuntimeError, match="closed"):
        loop.step()


# --------------------------------------------------------------------------- sinks


class TestRadioSink:
    def test_silencing_order_and_last_given(self):
        """Attenuation to the maximum, buffer destroyed, zeros, buffer destroyed: the device is
        last given zero output with the attenuation at its maximum and no buffer."""
        dev = FakeDevice()
        sink = RadioSink(sample_rate_hz=PLAN.sample_rate_hz, center_hz=2.4e9,
                         attenuation_db=20.0, device_object=dev)
        sink.send(np.full(100, 0.5, np.complex64))
        assert ("set", "tx_hardwaregain_chan0", -20.0) in dev.calls
        sink.close()
        tail = dev.calls[-4:]
        assert tail[0] == ("set", "tx_hardwaregain_chan0", -MAX_ATTENUATION_DB)
        assert tail[1] == ("tx_destroy_buffer",)
        assert tail[2][0] == "tx" and not np.any(tail[2][1])
        assert tail[3] == ("tx_destroy_buffer",) and not dev.buffer

    def test_send_scales_to_dac_words(self):
        dev = FakeDevice()
        sink = RadioSink(sample_rate_hz=1e6, center_hz=1e9, device_object=dev)
        sink.send(np.full(4, 1.0, np.complex64))
        assert np.allclose([c for c in dev.calls if c[0] == "tx"][0][1], 2.0 ** 14)

    def test_device_error_is_a_one_line_sink_error(self):
        sink = RadioSink(sample_rate_hz=1e6, center_hz=1e9, device_object=FakeDevice(2))
        from brimline.daemon.errors import SinkError
        with pytest.raises(SinkError, match=r"tx.radio.uri=.*transmit failed: OSError"):
            sink.send(np.zeros(4, np.complex64))
        sink.close()
        assert sink.counters["silence_failed:zeros"] == 1

    def test_missing_pyadi_iio_names_the_install(self, monkeypatch):
        import importlib

        from brimline.daemon.errors import SinkError
        real = importlib.import_module

        def no_adi(name, *a, **k):
            if name == "adi":
                raise ImportError("No module named 'adi'")
            return real(name, *a, **k)
        monkeypatch.setattr(importlib, "import_module", no_adi)
        with pytest.raises(SinkError, match=r"pip install 'brimline\[sdr\]'"):
            RadioSink(sample_rate_hz=1e6, center_hz=1e9)

    def test_failed_device_is_rebuilt_with_capped_backoff(self):
        """A tx() that fails: the sink drops the device, is silent (send() False, nothing
        reaches a device), and reopens it 0.125 s after the fault; failed openings double the
        wait up to the 0.5 s cap, and the new device gets the settings again, quiet until its
        first slot. (Times are binary fractions, so the sums are exact.)"""
        devices, opens = [FakeDevice()], {"fail": 0}

        def opener():
            if opens["fail"]:
                opens["fail"] -= 1
                raise SinkError("tx.radio.uri=x: no device")
            devices.append(FakeDevice())
            return devices[-1]
        sink = RadioSink(sample_rate_hz=1e6, center_hz=1e9, attenuation_db=20.0,
                         device_object=devices[0], open_device=opener,
                         reopen_backoff_s=0.125, reopen_backoff_max_s=0.5)
        slot = np.full(4, 0.5, np.complex64)
        assert sink.ready(0.0) and sink.send(slot)
        devices[0].fail_tx = 99
        assert not sink.send(slot) and sink.state == "reconnecting"
        assert sink.counters["device_errors"] == 1 and sink.device is None
        opens["fail"] = 3
        attempts, seen = [], 0
        for k in range(40):
            t = k / 16
            opened = sink.ready(t)
            if opened or sink.counters["reconnect_failures"] != seen:
                seen = sink.counters["reconnect_failures"]
                attempts.append(t)
            if opened:
                break
        # the first ready() (0.0) starts the wait: 0.125 fails, +0.25 fails, +0.5 fails,
        # +0.5 (capped) opens
        assert attempts == [0.125, 0.375, 0.875, 1.375]
        assert sink.state == "running" and sink.counters["reconnects"] == 1
        assert sink.counters["reconnect_failures"] == 3 and len(devices) == 2
        assert devices[1].calls[0] == ("set", "tx_hardwaregain_chan0", -MAX_ATTENUATION_DB)
        assert sink.send(slot)
        assert ("set", "tx_hardwaregain_chan0", -20.0) in devices[1].calls
        assert sink.counters["slots"] == 2
        sink.close()

    def test_device_that_does_not_come_back_fails(self):
        sink = RadioSink(sample_rate_hz=1e6, center_hz=1e9, device_object=FakeDevice(1),
                         open_device=lambda: (_ for _ in ()).throw(OSError(19, "gone")),
                         reopen_backoff_s=0.125, reopen_max_attempts=2)
        assert not sink.send(np.zeros(4, np.complex64))
        assert not sink.ready(0.0) and not sink.ready(0.125)
        with pytest.raises(SinkError, match=r"tx.radio.uri=.*device gone after 2 attempts: "
                                            r"OSError"):
            sink.ready(0.375)
        assert sink.state == "failed" and not sink.ready(9.0)
        sink.close()

    def test_bad_reopen_settings(self):
        with pytest.raises(SinkError, match=r"tx.reopen_backoff_max_s=0.1 must be >= "
                                            r"tx.reopen_backoff_s=0.2"):
            RadioSink(sample_rate_hz=1e6, center_hz=1e9, device_object=FakeDevice(),
                      reopen_backoff_s=0.2, reopen_backoff_max_s=0.1)

    def test_attenuation_out_of_range(self):
        from brimline.daemon.errors import SinkError
        with pytest.raises(SinkError, match=r"tx.attenuation_db=95.0 must be in"):
            RadioSink(sample_rate_hz=1e6, center_hz=1e9, attenuation_db=95.0,
                      device_object=FakeDevice())


def test_sigmf_sink_never_overwrites(tmp_path):
    from brimline.daemon.errors import SinkError
    (tmp_path / "x.sigmf-meta").write_text("{}")
    with pytest.raises(SinkError, match=r"tx.path=.*x.sigmf-data: .*exists already"):
        SigmfSink(tmp_path / "x", sample_rate_hz=1e6)


def test_stream_sink_sends_complex64_slots(ctx):
    with IqStreamSink(ANY_PORT, pattern="push", context=ctx) as sink:
        pull = ctx.socket(zmq.PULL)
        pull.setsockopt(zmq.LINGER, 0)
        pull.connect(sink.endpoint)
        x = (np.arange(8) + 1j).astype(np.complex64)
        # a PUSH with no peer yet refuses the slot (counted "dropped"): send until one arrives
        assert until(lambda: pull.poll(10), step=lambda: sink.send(x))
        assert np.array_equal(np.frombuffer(pull.recv(), "<c8"), x)
        pull.close()


def test_stream_sink_bad_endpoint(ctx):
    from brimline.daemon.errors import SinkError
    with pytest.raises(SinkError, match=r"tx.stream_endpoint=tcp://256.1.1.1:1"):
        IqStreamSink("tcp://256.1.1.1:1", context=ctx)


# --------------------------------------------------------------------------- command


def _tx_config(tmp_path: Path, extra: str = "", **tx) -> Path:
    keys = dict(sink="sigmf", path="out", realtime="false", max_frames=3,
                status_endpoint="tcp://127.0.0.1:0", frame_rate_hz=RATE_HZ)
    keys.update(tx)
    body = "\n".join(f"  {k}: {v}" for k, v in keys.items())
    text = textwrap.dedent("""\
        link:
          fft_size: 128
          cp_len: 16
          sample_rate_hz: 1920000.0
          used_tones_half: 40
          pilot_spacing: 8
          data_symbols: 4
          center_hz: 2400000000.0
        publish:
          map_endpoint: tcp://127.0.0.1:0
          snapshot_endpoint: tcp://127.0.0.1:0
          ack_endpoint: tcp://127.0.0.1:0
        """) + f"tx:\n{body}\n" + extra
    p = tmp_path / "tx.yaml"
    p.write_text(text)
    return p


def test_tx_check_and_run_to_a_sigmf_file(tmp_path, capsys):
    cfg = _tx_config(tmp_path)
    assert main(["tx", "--config", str(cfg), "--check"]) == 0
    assert ": OK: tx sink sigmf" in capsys.readouterr().out
    assert main(["tx", "--config", str(cfg), "--quiet"]) == 0
    assert read_sigmf(tmp_path / "out").n_samples == 3 * 4800
    assert main(["tx", "--config", str(cfg), "--check"]) == 2
    assert "exists already" in capsys.readouterr().err


@pytest.mark.parametrize("extra, match", [
    ("  backoff_db: -3.0\n", r"line \d+: tx.backoff_db=-3.0: .*must be in \[0, 60\]"),
    ("  on_loss: louder\n", r"tx.on_loss"),
    ("  frame_rate_hz: 5000.0\n", r"tx.frame_rate_hz=5000.0: leaves 384 samples"),
    ("  default_bits: 11\n", r"tx.default_bits=11"),
])
def test_bad_tx_keys_are_one_line(tmp_path, capsys, extra, match):
    cfg = _tx_config(tmp_path)
    cfg.write_text(cfg.read_text().replace("  frame_rate_hz: 400.0\n", "") + extra)
    assert main(["tx", "--config", str(cfg), "--check"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1
    import re
    assert re.search(match, err[0]), err[0]


def test_help_carries_the_rf_caution(capsys):
    with pytest.raises(SystemExit):
        main(["tx", "--help"])
    assert "RF caution" in capsys.readouterr().out


def test_error_in_the_loop_silences_the_device(tmp_path, ctx):
    """An exception in the loop (the device fails mid-run): closing silences first."""
    cfg = load_config(_tx_config(tmp_path, sink="radio"))
    dev = FakeDevice()
    sink = open_sink(cfg, PLAN, device_object=dev)
    loop = build_tx(cfg, PLAN, sink, status=False, context=ctx)
    dev.fail_tx = True
    from brimline.daemon.errors import SinkError
    with pytest.raises(SinkError):
        with loop:
            loop.step()
    dev.fail_tx = False
    assert dev.calls[-4][2] == -MAX_ATTENUATION_DB and dev.calls[-1] == ("tx_destroy_buffer",)
    assert dev.calls[-2][0] == "tx" and not np.any(dev.calls[-2][1])


_SIGNAL_RUNNER = """
import json, sys, numpy as np
from brimline.daemon.commands import cli
from brimline.drivers.devices import factory
from brimline.drivers.sinks import radio

class Recorder:
    def __init__(self):
        object.__setattr__(self, "log", [])
    def __setattr__(self, name, value):
        self.log.append(["set", name, value]); object.__setattr__(self, name, value)
        self._dump()
    def tx(self, data):
        data = np.asarray(data)
        self.log.append(["tx", int(data.size), bool(np.any(data))]); self._dump()
        if not getattr(self, "_said", False):
            object.__setattr__(self, "_said", True); print("SENDING", flush=True)
        import time; time.sleep(0.005)
    def tx_destroy_buffer(self):
        self.log.append(["tx_destroy_buffer"]); self._dump()
    def _dump(self):
        with open(sys.argv[2], "w") as f: json.dump(self.log, f)

radio.factory_open = lambda **kw: Recorder()
sys.exit(cli.main(["tx", "--config", sys.argv[1], "--quiet"]))
"""


@pytest.mark.parametrize("signum", [signal.SIGTERM, signal.SIGINT])
def test_signal_silences_the_transmitter(tmp_path, signum):
    """A running ``brimline tx`` (radio sink on a recording fake device) gets the signal and
    ends, leaving the device with attenuation at the maximum, zero output last and no buffer."""
    cfg = _tx_config(tmp_path, sink="radio", max_frames="null", realtime="true")
    runner = tmp_path / "runner.py"
    runner.write_text(_SIGNAL_RUNNER)
    log = tmp_path / "device.json"
    proc = subprocess.Popen([sys.executable, str(runner), str(cfg), str(log)],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            env={**os.environ, "PYTHONUNBUFFERED": "1"})
    try:
        assert proc.stdout.readline().strip() == "SENDING"
        proc.send_signal(signum)
        rc = proc.wait(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    assert rc == 0, proc.stderr.read()
    calls = json.loads(log.read_text())
    assert calls[-4] == ["set", "tx_hardwaregain_chan0", -MAX_ATTENUATION_DB]
    assert calls[-3] == ["tx_destroy_buffer"]
    assert calls[-2][0] == "tx" and calls[-2][2] is False
    assert calls[-1] == ["tx_destroy_buffer"]


def test_watch_shows_the_transmitter_status(pub, ctx):
    """``brimline watch`` pointed at the transmitter's status socket prints its line."""
    import io

    from brimline.daemon.net.publisher import StatusPublisher
    from brimline.daemon.views.watch import watch

    clock, sink = FakeClock(), ListSink()
    status = StatusPublisher(endpoint=ANY_PORT, rate_hz=1000.0, context=ctx)
    out = io.StringIO()
    import threading
    with make_loop(pub, ctx, sink, clock, status=status) as loop:
        result = []
        t = threading.Thread(target=lambda: result.append(
            watch(status.endpoint, once=True, duration_s=30.0, out=out)))
        t.start()
        while t.is_alive():
            clock.t += 0.01
            loop.step()
            t.join(0.01)
    assert result == [0]
    assert out.getvalue().startswith("tx following: map -1, frame ")


@pytest.mark.hardware
def test_radio_sink_silences_a_real_radio():
    """With a pyadi-iio radio at BRIMLINE_TEST_URI (default ip:192.168.2.1): one slot at 60 dB
    attenuation, then silence. RF caution: transmits briefly; cable TX to a load or through
    attenuators and use a frequency you may use (BRIMLINE_TEST_CENTER_HZ)."""
    pytest.importorskip("adi")
    uri = os.environ.get("BRIMLINE_TEST_URI", "ip:192.168.2.1")
    center = float(os.environ.get("BRIMLINE_TEST_CENTER_HZ", "nan"))
    if not math.isfinite(center):
        pytest.skip("set BRIMLINE_TEST_CENTER_HZ to a frequency you may use")
    with RadioSink(sample_rate_hz=PLAN.sample_rate_hz, center_hz=center, attenuation_db=60.0,
                   uri=uri) as sink:
        sink.send(np.zeros(4800, np.complex64))
        dev = sink.device
    assert dev.tx_hardwaregain_chan0 == pytest.approx(-MAX_ATTENUATION_DB, abs=0.25)


def test_status_gives_lag_and_power_against_the_limit(pub, ctx):
    """The status's power figures are 10 log10 of the bounded powers actually sent: a map at
    half power on every tone gives 10 log10(0.5) = -3.01 dB total and peak; a map asking 4x on
    every tone is cut to the 0 dB tone limit (PowerBound). A map applied at its effective frame
    has lag 0; one that arrives after its frame is counted from that frame."""
    clock, sink = FakeClock(), ListSink()
    with make_loop(pub, ctx, sink, clock, max_tone_db=0.0, max_total_db=0.0, cap_db=6.5,
                   budget_db=6.5) as loop:  # the follower accepts 4x; the bound cuts it
        st = loop.status(0.0)
        assert st["applied_lag_frames"] is None and st["power_db"] is None
        subscribed(pub, loop, clock)
        pub.publish(plan_map(0, 2, power=0.5))
        assert until(lambda: loop.follower.current is not None,
                     step=lambda: loop.follower.poll(0.005))
        for _ in range(3):
            loop.step()
        st = loop.status(0.0)
        assert st["map_seq"] == 0 and st["applied_lag_frames"] == 0
        assert st["power_db"] == pytest.approx(10 * math.log10(0.5), abs=0.005)
        assert st["peak_tone_db"] == pytest.approx(10 * math.log10(0.5), abs=0.005)
        assert st["max_total_db"] == 0.0 and st["max_tone_db"] == 0.0
        for _ in range(4):
            loop.step()  # counter now 7
        pub.publish(plan_map(1, 5, power=4.0))  # names frame 5, already sent
        assert until(lambda: loop.follower.current.seq == 1,
                     step=lambda: loop.follower.poll(0.005))
        loop.step()
        st = loop.status(0.0)
        assert st["map_seq"] == 1 and st["applied_lag_frames"] == 7 - 5
        assert st["power_db"] == 0.0 and st["peak_tone_db"] == 0.0


def test_watch_shows_the_transmitter_beside_the_daemon(pub, ctx):
    """``watch --tx-endpoint`` on a terminal: the daemon's screen carries the transmitter's
    applied map from its own status socket. The view's clock stands still until the screen
    shows it (a real-time deadline only catches a hang)."""
    import io
    import threading
    import time as _time

    from brimline.daemon.net.publisher import StatusPublisher
    from brimline.daemon.runtime.status import build_status
    from brimline.daemon.views.watch import watch

    class Terminal(io.StringIO):
        def isatty(self):
            return True

    clock, sink = FakeClock(), ListSink()
    tx_pub = StatusPublisher(endpoint=ANY_PORT, rate_hz=1000.0, context=ctx)
    daemon_pub = StatusPublisher(endpoint=ANY_PORT, rate_hz=1000.0, context=ctx)
    out = Terminal()
    hang = _time.monotonic() + 60

    def view_clock():
        done = "applied map" in out.getvalue() or _time.monotonic() > hang
        return 1e9 if done else 0.0

    with make_loop(pub, ctx, sink, clock, status=tx_pub) as loop:
        result = []
        t = threading.Thread(target=lambda: result.append(
            watch(daemon_pub.endpoint, duration_s=30.0, out=out, clock=view_clock,
                  context=ctx, tx_endpoint=tx_pub.endpoint)))
        t.start()
        status = build_status(time_s=1.0, epoch="e1", driver={"name": "sim",
                                                              "state": "running"},
                              frames={}, estimate_age_s=None, tone_index=None, snr_db=None)
        while t.is_alive():
            clock.t += 0.01
            loop.step()
            daemon_pub.publish(status)
            t.join(0.01)
    daemon_pub.close()
    assert result == [0]
    screen = re.sub(r"\x1b\[[0-9;?]*[A-Za-z]", "", out.getvalue())  # styles off
    assert "applied map -1" in screen and "tx following" in screen


# --------------------------------------------------------------------------- CURVE


def _curve_tx_config(tmp_path: Path, endpoints: dict, keys: str) -> Path:
    p = tmp_path / "tx-curve.yaml"
    p.write_text(textwrap.dedent(f"""\
        publish:
          map_endpoint: {endpoints.get("maps", "tcp://127.0.0.1:7341")}
          snapshot_endpoint: {endpoints.get("snapshots", "tcp://127.0.0.1:7342")}
          ack_endpoint: {endpoints.get("acks", "tcp://127.0.0.1:7344")}
        tx:
          sink: stream
          stream_endpoint: tcp://127.0.0.1:0
          status_endpoint: tcp://127.0.0.1:0
        """) + keys)
    return p


class TestCurve:
    def test_tx_follows_a_curve_secured_daemon(self, tmp_path):
        """Keys from ``brimline keys``: the daemon admits the transmitter's public key (its
        publish.curve_clients_dir). brimline tx's loop with tx.curve_daemon_key and
        tx.curve_own_key adopts the daemon's maps, applies one and acknowledges it; a
        transmitter with a key pair the daemon does not know never gets a map."""
        from brimline.daemon.runtime.service import Service

        for d, name in (("keys", "daemon"), ("clients", "tx1"), ("others", "stranger")):
            assert main(["keys", str(tmp_path / d), "--name", name]) == 0
        daemon_cfg = tmp_path / "daemon.yaml"
        daemon_cfg.write_text(textwrap.dedent("""\
            driver:
              kind: sim
              sim: {realtime: true, profile: awgn, doppler_hz: 0.0, snr_db: 27.0}
            publish:
              map_endpoint: tcp://127.0.0.1:0
              snapshot_endpoint: tcp://127.0.0.1:0
              ack_endpoint: tcp://127.0.0.1:0
              linger_s: 0.0
              curve_secret_key: keys/daemon.key_secret
              curve_clients_dir: clients
            status:
              endpoint: tcp://127.0.0.1:0
            """))
        svc = Service(load_config(daemon_cfg))
        stop = threading.Event()
        runner = threading.Thread(target=svc.run, kwargs={"stop": stop}, daemon=True)
        runner.start()
        loops = []
        try:
            assert until(lambda: "acks" in svc.endpoints, timeout_s=60.0)
            for own in ("clients/tx1.key_secret", "others/stranger.key_secret"):
                cfg = load_config(_curve_tx_config(
                    tmp_path, svc.endpoints, f"  curve_daemon_key: keys/daemon.key\n"
                                             f"  curve_own_key: {own}\n"))
                plan = make_plan(**cfg.link.model_dump())
                loops.append(build_tx(cfg, plan, ListSink(), status=False))
            good, stranger = loops
            assert until(lambda: good.counters["maps_applied"] >= 1
                         and good.follower.counters["acks_sent"] >= 1,
                         step=lambda: [lp.step() for lp in loops], timeout_s=60.0)
            assert good.in_force is not None and good.follower.synced
            assert stranger.follower.current is None and not stranger.counters["maps_applied"]
            seq = good.in_force.seq
            assert until(lambda: svc.acks.get("followers", {}).get("count", 0) >= 2
                         and svc.acks["followers"]["seq"] >= 0, timeout_s=60.0,
                         step=lambda: good.step())
            assert 0 <= svc.acks["followers"]["seq"] and seq >= 0
        finally:
            for lp in loops:
                lp.close()
            stop.set()
            runner.join(60)
            svc.close()

    @pytest.mark.parametrize("keys, match", [
        ("  curve_daemon_key: keys/daemon.key\n",
         r"line \d+: tx.curve_own_key=None: tx.curve_daemon_key and tx.curve_own_key go "
         r"together"),
        ("  curve_daemon_key: keys/missing.key\n  curve_own_key: keys/tx.key_secret\n",
         r"error: tx.curve_daemon_key=\S*/missing.key: cannot read CURVE key"),
        ("  curve_daemon_key: keys/daemon.key\n  curve_own_key: keys/tx.key\n",
         r"error: tx.curve_own_key=\S*/tx.key: has no secret key"),
        ("  curve_daemon_key: keys/junk.key\n  curve_own_key: keys/tx.key_secret\n",
         r"error: tx.curve_daemon_key=\S*/junk.key: public key "),
    ])
    def test_bad_key_settings_are_one_line(self, tmp_path, capsys, keys, match):
        import re

        for name in ("daemon", "tx"):
            assert main(["keys", str(tmp_path / "keys"), "--name", name]) == 0
        (tmp_path / "keys/junk.key").write_text("public-key = \"short\"\n")
        cfg = _curve_tx_config(tmp_path, {}, keys)
        capsys.readouterr()
        for args in (["--check"], ["--duration", "5"]):
            assert main(["tx", "--config", str(cfg), *args]) == 2
            err = capsys.readouterr().err.strip().splitlines()
            assert len(err) == 1 and re.search(match, err[0]), err
