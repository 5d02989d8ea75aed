"""The emulated radio and its air: pyadi-iio buffer semantics, fault knobs, and the transmitter
following maps over the emulated air with the switch seen in the received headers.

The emulation runs at real-time pace; tests assert order, counts and content only, and their
deadlines only catch a hang.
"""

from __future__ import annotations

import errno
import threading
import time

import numpy as np
import pytest
from protocol_helpers import ANY_PORT, until
from test_tx import PLAN, make_loop, plan_map, subscribed

from brimline.daemon.errors import SinkError, SourceError
from brimline.daemon.net.publisher import MapPublisher
from brimline.drivers.air.loopback import AirReceiver, AirSender, StreamChannel
from brimline.drivers.devices.emulated import ADC_MAX, EmulatedRadio, vanish_reference_s
from brimline.drivers.devices.factory import open_device
from brimline.drivers.link.frame import make_plan
from brimline.drivers.link.receiver import FrameScanner, Receiver
from brimline.drivers.sinks.radio import RadioSink

FS = 100_000  # a slow sample rate keeps the real-time emulation light


def pair(**rx_faults):
    """A transmitting and a receiving emulated radio on a fresh air endpoint."""
    tx = EmulatedRadio(air_endpoint=ANY_PORT, snr_db=60.0)
    tx.sample_rate = FS
    tx.tx_hardwaregain_chan0 = 0.0
    tx.tx_cyclic_buffer = True
    tone = np.exp(2j * np.pi * np.arange(1000) / 8) * 2 ** 13  # fs/8, half full scale
    tx.tx(tone)
    rx = EmulatedRadio(air_endpoint=tx.air_tx_endpoint, snr_db=60.0, **rx_faults)
    rx.sample_rate = FS
    rx.rx_buffer_size = 1000
    return tx, rx


def heard(rx, *, at_least=1, timeout_s=30.0):
    """rx() until a buffer with signal arrives (the PUB/SUB join takes a moment)."""
    out = []
    assert until(lambda: len(out) >= at_least,
                 step=lambda: out.append(y) if np.abs(y := rx.rx()).max() > 100 else None,
                 timeout_s=timeout_s)
    return out


class TestBufferSemantics:
    def test_cyclic_buffer_refuses_a_second_tx_until_destroyed(self):
        dev = EmulatedRadio(air_endpoint=ANY_PORT)
        dev.sample_rate = FS
        dev.tx_cyclic_buffer = True
        dev.tx(np.zeros(100, complex))
        with pytest.raises(RuntimeError, match="cyclic"):
            dev.tx(np.zeros(100, complex))
        dev.tx_destroy_buffer()
        assert not dev.tx_buffer_active
        dev.tx(np.zeros(200, complex))
        dev.close()

    def test_streaming_buffers_keep_their_length(self):
        dev = EmulatedRadio(air_endpoint=ANY_PORT)
        dev.sample_rate = FS
        dev.tx(np.zeros(100, complex))
        with pytest.raises(ValueError, match=r"holds 100"):
            dev.tx(np.zeros(50, complex))
        dev.close()

    def test_rx_buffer_size_changes_only_after_destroy(self):
        tx, rx = pair()
        try:
            assert rx.rx().size == 1000
            rx.rx_buffer_size = 500
            assert rx.rx().size == 1000  # pyadi-iio: the buffer keeps the size it was made with
            rx.rx_destroy_buffer()
            assert rx.rx().size == 500
        finally:
            tx.close()
            rx.close()

    def test_levels_and_adc_clipping(self):
        """A half-full-scale tone at 0 dB attenuation and 0 dB path gain arrives at 256 ADC
        units per unit amplitude (30 dB receive gain); 40 dB more gain clips at the 12-bit
        range."""
        tx, rx = pair()
        try:
            y = heard(rx)[0]
            rms = np.sqrt(np.mean(np.abs(y[200:]) ** 2))
            assert rms == pytest.approx(256 * 0.5, rel=0.05)
            rx.rx_hardwaregain_chan0 = 70.0
            z = rx.rx()
            assert np.abs(z.real).max() <= ADC_MAX + 1 and np.abs(z.real).max() >= ADC_MAX
        finally:
            tx.close()
            rx.close()

    def test_destroyed_transmitter_leaves_the_air_silent(self):
        tx, rx = pair()
        try:
            heard(rx)
            tx.tx_destroy_buffer()
            assert until(lambda: np.abs(rx.rx()).max() < 10)
            assert tx.history[-1] == ("tx_destroy_buffer",)
        finally:
            tx.close()
            rx.close()


class TestFaults:
    def test_receive_timeout_every_n(self):
        tx, rx = pair(rx_timeout_every=3)
        try:
            rx.rx()
            rx.rx()
            with pytest.raises(TimeoutError) as info:
                rx.rx()
            assert info.value.errno == errno.ETIMEDOUT
            rx.rx()
            assert rx.counters["rx_timeouts"] == 1 and rx.counters["rx_buffers"] == 3
        finally:
            tx.close()
            rx.close()

    def test_overflow_every_n_loses_samples(self):
        """Every 2nd buffer half a buffer is lost before it: 500 samples of a tone at fs/8 are
        500 * pi/4 = 125 pi of phase, so across an overflow the phase jumps by pi; across
        contiguous buffers it runs on."""
        tx, rx = pair(overflow_every=2)
        try:
            heard(rx)
            checked = set()
            deadline = time.monotonic() + 120.0  # only catches a hang
            while time.monotonic() < deadline:  # pairs of buffers with no silence from a late
                # sender (a busy machine makes many such pairs; they are skipped, not judged)
                silent = rx.air_counters.get("silent_samples", 0)
                first, second = rx.rx(), rx.rx()
                if rx.air_counters.get("silent_samples", 0) != silent:
                    continue
                step = np.angle(first[-1] * np.conj(first[-2]))
                jump = np.angle(second[0] * np.conj(first[-1] * np.exp(1j * step)))
                overflowed = rx.counters["rx_buffers"] % 2 == 0  # before the second buffer
                assert abs(abs(jump) - (np.pi if overflowed else 0.0)) < 0.3
                checked.add(overflowed)
                if len(checked) == 2:
                    break
                rx.rx()  # shift the pairing by one buffer
            assert checked == {True, False}
            assert rx.counters["overflows"] >= 1
        finally:
            tx.close()
            rx.close()

    def test_sample_clock_offset_scales_the_tone_frequency(self):
        """Sampling at fs (1 + e) sees a tone at f as f / (1 + e) cycles per sample (the
        definition of a sampled sinusoid's digital frequency); e = 1000 ppm here."""
        tx, rx = pair(clock_ppm=1000.0)
        rx.rx_hardwaregain_chan0 = 50.0  # a larger tone (1280 ADC units): finer phase
        try:
            y = heard(rx, at_least=2)[-1]
            measured = np.angle(np.sum(y[1:] * np.conj(y[:-1]))) / (2 * np.pi)
            assert measured == pytest.approx((1 / 8) / 1.001, rel=2e-4)
            assert measured != pytest.approx(1 / 8, rel=2e-4)
        finally:
            tx.close()
            rx.close()

    def test_transmit_underruns_are_counted(self):
        tx = EmulatedRadio(air_endpoint=ANY_PORT, tx_underrun_every=2)
        tx.sample_rate = FS
        tx.tx_cyclic_buffer = True
        tx.tx(np.ones(500, complex))
        assert until(lambda: tx.counters["underruns"] >= 2)
        assert tx.counters["tx_buffers"] >= 1
        tx.close()

    def test_vanished_device_is_one_line_naming_the_uri(self):
        with pytest.raises(SinkError, match=r"tx.radio.uri=emulated:x: emulated radio: .*"
                                            r"vanished"):
            open_device(backend="emulated", uri="emulated:x", where="tx.radio",
                        error=SinkError, emulated=dict(vanish_after_s=0.0, vanish_for_s=1e9))

    def test_bad_fault_setting_is_one_line(self):
        with pytest.raises(SourceError, match=r"emulated.clock_ppm=5000.0 must be in"):
            open_device(backend="emulated", uri="emulated:x", where="driver.radio",
                        error=SourceError, emulated=dict(clock_ppm=5000.0))

    def test_unknown_backend(self):
        with pytest.raises(SourceError, match=r"driver.radio.backend='usrp' must be one of"):
            open_device(backend="usrp", where="driver.radio", error=SourceError)


def _ping(sender) -> None:
    """The same 4 silent samples at index 0, a few milliseconds apart (not a flood that fills
    the high-water marks while the subscription is being made)."""
    sender.send(0, np.zeros(4, np.complex64))
    time.sleep(0.005)


def _quiet(receiver, still_s: float = 0.2) -> bool:
    """Empty the queue; true once nothing has arrived for ``still_s`` seconds."""
    receiver.take(receiver.drain())
    time.sleep(0.01)
    return time.monotonic() - receiver.last_arrival_s >= still_s


class TestAir:
    def test_malformed_messages_are_counted(self, ctx):
        import zmq

        raw = ctx.socket(zmq.PUB)
        raw.setsockopt(zmq.LINGER, 0)
        port = raw.bind_to_random_port("tcp://127.0.0.1")
        with AirReceiver(f"tcp://127.0.0.1:{port}", context=ctx) as receiver:
            assert until(lambda: receiver.counters["malformed"] > 0,
                         step=lambda: (raw.send_multipart([b"x", b"123"]), receiver.drain()))
            assert receiver.drain() == 0
        raw.close()

    def test_samples_arrive_in_order(self, ctx):
        with AirSender(ANY_PORT, context=ctx) as sender, \
                AirReceiver(sender.endpoint, context=ctx) as receiver:
            assert until(lambda: receiver.drain() > 0, step=lambda: _ping(sender))
            # pings still in flight (a busy machine) arrive first: start from a quiet, empty
            # queue so the two messages below are not behind them (or dropped at the HWM)
            assert until(lambda: _quiet(receiver))
            sender.send(4, np.arange(3, dtype=np.complex64))
            sender.send(7, np.arange(3, 6, dtype=np.complex64))
            assert until(lambda: receiver.drain() >= 6)
            assert np.array_equal(receiver.take(8), np.r_[np.arange(6), 0, 0])
            assert receiver.counters["silent_samples"] == 2

    def test_messages_are_placed_by_their_index(self, ctx):
        """A jump of the first-sample index (the transmitter sent nothing for a while) is that
        much silence in the stream; an index that goes back (a transmitter started again) is a
        new start."""
        with AirSender(ANY_PORT, context=ctx) as sender, \
                AirReceiver(sender.endpoint, context=ctx) as receiver:
            assert until(lambda: receiver.drain() > 0, step=lambda: _ping(sender))
            assert until(lambda: _quiet(receiver))
            sender.send(10, np.arange(1, 4, dtype=np.complex64))
            sender.send(15, np.arange(4, 6, dtype=np.complex64))
            sender.send(0, np.arange(6, 8, dtype=np.complex64))
            assert until(lambda: receiver.drain() >= 15)
            before = receiver.counters["gap_samples"]
            assert np.array_equal(receiver.take(receiver.drain()),
                                  np.r_[[0] * 6, 1, 2, 3, 0, 0, 4, 5, 6, 7])
            assert before == 8 and receiver.counters["silent_samples"] == 0

    def test_stream_channel_is_continuous_across_chunks(self, rng):
        """Passing a stream in two chunks gives the same (noise-free) output as in one, the
        filter tail carried over (linear time-invariant channel: convolution is associative
        over concatenation)."""
        plan = make_plan()
        x = (rng.standard_normal(3000) + 1j * rng.standard_normal(3000)).astype(np.complex64)
        one = StreamChannel(plan, snr_db=300.0, profile="awgn", rng=np.random.default_rng(1))
        two = StreamChannel(plan, snr_db=300.0, profile="awgn", rng=np.random.default_rng(1))
        whole = one(x)
        parts = np.concatenate([two(x[:1234]), two(x[1234:])])
        assert np.allclose(whole, parts, atol=1e-4)


# --------------------------------------------------------------------------- end to end


def test_maps_switch_at_the_named_frame_over_the_emulated_air(ctx):
    """brimline tx's loop on an emulated transmitter, an emulated receiver on the same air and
    the project's receiver on its buffers: every decoded header carries the map in force at its
    frame counter (seq 0 from frame 30, seq 1 from frame 60), and both switches are seen."""
    rate = 100.0  # slots of 19200 samples: one 1152-sample frame and a long gap
    dev = EmulatedRadio(air_endpoint=ANY_PORT, snr_db=30.0, path_gain_db=22.0)
    sink = RadioSink(sample_rate_hz=PLAN.sample_rate_hz, center_hz=2.4e9, attenuation_db=10.0,
                     device_object=dev)
    with MapPublisher(map_endpoint=ANY_PORT, snapshot_endpoint=ANY_PORT, ack_endpoint=ANY_PORT,
                      heartbeat_s=0.05, linger_s=0.0, context=ctx, epoch="e1") as pub:
        clock_s = [0.0]
        loop = make_loop(pub, ctx, sink, lambda: clock_s[0], backoff_db=12.0,
                         frame_rate_hz=rate)
        subscribed(pub, loop, lambda: clock_s[0])
        pub.publish(plan_map(0, 30))
        pub.publish(plan_map(1, 60, bits=4))
        assert until(lambda: loop.follower.current is not None and
                     loop.follower.current.seq == 1, step=lambda: loop.follower.poll(0.005))
        loop.step(0.0)  # binds the air
        rx = EmulatedRadio(air_endpoint=dev.air_tx_endpoint, snr_db=30.0, path_gain_db=22.0)
        rx.sample_rate = int(PLAN.sample_rate_hz)
        rx.rx_buffer_size = loop.slot_len
        stop = threading.Event()
        runner = threading.Thread(target=loop.run, args=(stop,), daemon=True)
        runner.start()
        scanner = FrameScanner(Receiver(PLAN, default_bits=2))
        headers = []

        def receive():
            for _, res in scanner.feed(rx.rx() / 2048.0):
                if res.header_ok:
                    headers.append((res.map_seq, res.counter))
        try:
            assert until(lambda: headers and headers[-1][1] >= 70, step=receive,
                         timeout_s=120.0)
        finally:
            stop.set()
            runner.join(30)
            loop.close()
            rx.close()
    expected = [(-1 if k < 30 else 0 if k < 60 else 1, k) for _, k in headers]
    assert headers == expected
    seqs = {s for s, _ in headers}
    assert {0, 1} <= seqs
    assert dev.history[-1] == ("tx_destroy_buffer",) and not dev.tx_buffer_active
    assert dev.tx_hardwaregain_chan0 == -89.75


def test_transmitter_rebuilds_a_vanished_device(ctx):
    """The emulated transmitter vanishes for 1.5 s (the vanish knob) under brimline tx's loop:
    the sink's state goes reconnecting, the loop sends nothing meanwhile (slots_down) and its
    frame counter stands still, the device is rebuilt, and the frames resume under the map in
    force: a map published while the device was away is the one the first frames after the
    return carry (checked from the received headers), and it is acknowledged."""
    rate = 100.0
    port = _free_ports(1)[0]  # a rebuilt device binds the same air endpoint again
    air = f"tcp://127.0.0.1:{port}"
    start = time.monotonic() - vanish_reference_s() + 1.5
    knobs = dict(air_endpoint=air, snr_db=30.0, path_gain_db=22.0, vanish_after_s=start,
                 vanish_for_s=1.5)
    sink = RadioSink(sample_rate_hz=PLAN.sample_rate_hz, center_hz=2.4e9, attenuation_db=10.0,
                     open_device=lambda: EmulatedRadio(**knobs), reopen_backoff_s=0.1,
                     reopen_backoff_max_s=0.4)
    states = []
    with MapPublisher(map_endpoint=ANY_PORT, snapshot_endpoint=ANY_PORT, ack_endpoint=ANY_PORT,
                      heartbeat_s=0.05, linger_s=0.0, context=ctx, epoch="e1") as pub:
        loop = make_loop(pub, ctx, sink, time.monotonic, backoff_db=12.0, frame_rate_hz=rate,
                         hold_s=1e6)
        subscribed(pub, loop, time.monotonic)
        pub.publish(plan_map(0, 0))
        assert until(lambda: loop.follower.current is not None,
                     step=lambda: loop.follower.poll(0.005))
        rx = EmulatedRadio(air_endpoint=air, snr_db=30.0, path_gain_db=22.0)
        rx.sample_rate = int(PLAN.sample_rate_hz)
        rx.rx_buffer_size = loop.slot_len
        stop = threading.Event()
        runner = threading.Thread(target=loop.run, args=(stop,), daemon=True)
        runner.start()
        scanner = FrameScanner(Receiver(PLAN, default_bits=2))
        headers, published, acks = [], [], []

        def receive():
            pub.tick(time.monotonic())
            acks.extend(pub.poll_acks())
            states.append(sink.state)
            if sink.state == "reconnecting" and not published:
                published.append(loop.counter)
                pub.publish(plan_map(1, loop.counter, bits=4))
            try:
                y = rx.rx()
            except OSError:  # the receiver is part of the same emulated process: gone too
                return
            for _, res in scanner.feed(y / 2048.0):
                if res.header_ok:
                    headers.append((res.map_seq, res.counter))
        try:
            assert until(lambda: any(s == 1 for s, _ in headers[-5:]) and len(headers) > 5,
                         step=receive, timeout_s=120.0)
        finally:
            stop.set()
            runner.join(30)
            st = loop.status(time.monotonic())
            loop.close()
            rx.close()
    assert "reconnecting" in states and states[-1] == "running"
    assert st["device"] == "running" and st["reconnects"] == 1 and st["device_errors"] >= 1
    assert st["slots_down"] > 0
    counters = [k for _, k in headers]
    assert counters == sorted(counters)  # never a frame number twice or backwards
    # The counter stood still while the device was away, so seq 1 named the frame the
    # transmitter resumed with: its acknowledgement says so, and every frame heard from
    # there on carries it. (The first frames after the return can be missed: the receiver's
    # air socket reconnects to the rebuilt device; frames queued in the vanished device's
    # buffers are lost with it.)
    assert [a["frame"] for a in acks if a["seq"] == 1] == [published[0]]
    assert all(s == 1 for s, k in headers if k >= published[0])
    assert all(s == 0 for s, k in headers if k < published[0])


def _free_ports(n: int) -> list[int]:
    import socket

    socks = [socket.socket() for _ in range(n)]
    try:
        for s in socks:
            s.bind(("127.0.0.1", 0))
        return [s.getsockname()[1] for s in socks]
    finally:
        for s in socks:
            s.close()


@pytest.mark.slow
def test_two_processes_close_the_loop_over_the_emulated_air(tmp_path):
    """The rehearsal as a newcomer runs it: ``brimline run`` with an emulated receiver and
    ``brimline tx`` with an emulated transmitter, two processes on the loopback air. The
    transmitter applies maps the daemon made from what its receiver heard."""
    import subprocess
    import sys
    from pathlib import Path

    root = Path(__file__).resolve().parents[1]
    maps, snap, status, acks, air, tx_status = _free_ports(6)
    swap = {"7341": str(maps), "7342": str(snap), "7343": str(status), "7344": str(acks),
            "7350": str(air), "7345": str(tx_status), "7353": str(_free_ports(1)[0])}
    paths = {}
    for side in ("rx", "tx"):
        text = (root / "config" / f"rehearsal-{side}.yaml").read_text()
        for old, new in swap.items():
            text = text.replace(f"127.0.0.1:{old}", f"127.0.0.1:{new}")
        paths[side] = tmp_path / f"rehearsal-{side}.yaml"
        paths[side].write_text(text)
    brimline = [sys.executable, "-c", "import sys; from brimline.daemon.commands.cli import "
                                      "main; sys.exit(main(sys.argv[1:]))"]
    daemon = subprocess.Popen(brimline + ["run", "--config", str(paths["rx"]), "--quiet",
                                          "--duration", "40"],
                              stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        tx = subprocess.run(brimline + ["tx", "--config", str(paths["tx"]), "--duration", "15"],
                            capture_output=True, text=True, timeout=120)
    finally:
        daemon.terminate()
        out, err = daemon.communicate(timeout=60)
    assert tx.returncode == 0, tx.stderr
    last = tx.stdout.strip().splitlines()[-1]
    assert last.startswith("tx stopped: map ")
    applied = int(last.split("maps applied ")[1].split(",")[0])
    assert applied >= 1 and " map -1," not in last, last
    assert daemon.returncode == 0, err


def test_rehearsal_survives_every_fault_and_shows_it(monkeypatch):
    """Both ends of the rehearsal (config/rehearsal-rx.yaml, config/rehearsal-tx.yaml) in one
    process on the real air sockets, with every fault knob on at once: receive overflows every
    10 buffers, a receive timeout every 150, the receiving device gone for 2 s, its sample clock
    50 ppm fast, and a transmit underrun every 60 buffer periods. Each is survived (valid
    estimates and new maps after all of them) and shows in the status stream (the daemon's
    driver state and counters, its measured sample clock offset, the transmitter's underruns),
    and no map is made from a stale or
    damaged estimate: a map published while the radio is away is the fallback map, and every
    other map comes from a valid estimate younger than fallback.stale_after_s."""
    from pathlib import Path

    from brimline.daemon.runtime.assemble import build_core, build_tx, open_sink
    from brimline.daemon.runtime.config import load_config
    from brimline.daemon.runtime.service import Service

    root = Path(__file__).resolve().parents[1] / "config"
    air = f"tcp://127.0.0.1:{_free_ports(1)[0]}"
    vanish_at = time.monotonic() - vanish_reference_s() + 8.0
    back_s = vanish_reference_s() + vanish_at + 2.0  # monotonic time the radio returns
    rx_cfg = load_config(root / "rehearsal-rx.yaml", overrides={
        "emulated.air_endpoint": air, "emulated.overflow_every": 10,
        "emulated.rx_timeout_every": 150, "emulated.vanish_after_s": vanish_at,
        "emulated.vanish_for_s": 2.0, "emulated.clock_ppm": 50.0,
        "driver.radio.backoff_s": 0.1, "driver.radio.backoff_max_s": 0.4,
        "publish.map_endpoint": ANY_PORT, "publish.snapshot_endpoint": ANY_PORT,
        "publish.ack_endpoint": ANY_PORT, "status.endpoint": ANY_PORT,
        # quick to move, so that maps keep coming after each fault
        "emulated.profile": "epa", "emulated.doppler_hz": 2.0,
        "change.up_dwell_s": 0.2, "change.max_maps_per_s": 8.0})
    tx_cfg = load_config(root / "rehearsal-tx.yaml", overrides={
        "emulated.air_endpoint": air, "emulated.tx_underrun_every": 60,
        "tx.status_endpoint": ANY_PORT})
    stale_after_s = rx_cfg.fallback.stale_after_s
    made = []  # (map, estimate valid, estimate age s, driver state) for maps from estimates
    away = []  # maps published while the receiving radio was away
    taken_s = {}  # map seq -> driver time of the estimate it was made from

    svc = Service(rx_cfg)
    process = svc.process

    def taking(estimate, **kw):
        before = svc.current_map
        now = time.monotonic()
        out = process(estimate, **kw)
        m = svc.current_map
        if m is not None and m is not before:
            made.append((m, estimate.valid, now - estimate.time_s))
            taken_s[m.seq] = estimate.time_s
        return out
    svc.process = taking

    from brimline.daemon.net.publisher import MapPublisher
    real_publish = MapPublisher.publish

    def publish(self, load_map):
        if svc.driver is not None and getattr(svc.driver, "state", "") == "reconnecting":
            away.append(load_map)
        return real_publish(self, load_map)
    monkeypatch.setattr(MapPublisher, "publish", publish)

    plan = build_core(tx_cfg)[0]
    statuses, tx_statuses = [], []
    with open_sink(tx_cfg, plan) as sink, svc:
        svc.start()
        ep = svc.endpoints
        loop = build_tx(tx_cfg, plan, sink, status=False, map_endpoint=ep["maps"],
                        snapshot_endpoint=ep["snapshots"], ack_endpoint=ep["acks"])
        stop = threading.Event()
        runner = threading.Thread(target=loop.run, args=(stop,), daemon=True)
        runner.start()

        def step():
            st = svc.step(0.05)
            if st is not None:
                statuses.append(st)
                tx_statuses.append(loop.status(time.monotonic()))

        def done():
            if not statuses:
                return False
            last = statuses[-1]
            c = last["driver"]["counters"]
            return (c.get("timeouts", 0) >= 1 and c.get("reconnect_failures", 0) >= 1
                    and c.get("suspected_overflows", 0) + c.get("lost_frames", 0) >= 1
                    and last["driver"]["state"] == "running"
                    and tx_statuses[-1]["underruns"] >= 1
                    and any(not m.fallback and m.created_s > back_s for m, *_ in made))
        try:
            assert until(done, step=step, timeout_s=240.0), statuses[-1:]
        finally:
            stop.set()
            runner.join(30)
            loop.close()
    assert statuses[-1]["driver"]["state"] == "running"
    shown = [s for s in statuses if s["driver"]["state"] == "reconnecting"]
    assert all("driver_reconnecting" in s["alarms"] for s in shown)
    c = statuses[-1]["driver"]["counters"]
    assert c["damaged_frames"] >= 1  # frames spliced across an overflow: marked invalid
    assert tx_statuses[-1]["state"] in ("following", "holding")
    # No map from a stale or damaged estimate.
    # While the radio is away only the safe map is made; a map made from an estimate taken
    # before it went (queued when the device vanished) may still go out in those moments.
    gone_s = back_s - 2.0
    assert away and all(m.fallback or taken_s[m.seq] < gone_s for m in away), \
        [(m.reason, taken_s.get(m.seq)) for m in away]
    assert any(m.fallback for m in away)
    assert all(valid and age < stale_after_s for m, valid, age in made if not m.fallback)
    assert any(s["driver"]["state"] == "reconnecting" for s in statuses)
    # The sample clock, 50 ppm fast, shows as measured from the frame starts (between the
    # overflows, which restart the fit); generous tolerance: starts come in whole samples.
    shown = [s["driver"]["clock_offset_ppm"] for s in statuses
             if s["driver"]["clock_offset_ppm"] is not None]
    assert shown and abs(shown[-1] - 50.0) < 20.0, shown[-10:]
