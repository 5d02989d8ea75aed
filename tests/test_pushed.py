"""Socket sources: estimates pushed by the user's own receiver (drivers/sources/pushed.py) and raw
IQ over ZeroMQ (drivers/sources/iqstream.py). Good messages are accepted, every bad class is
dropped and counted (never a crash), the README's sender runs as written, and the same IQ gives
the same estimates over a socket as from a file."""

from __future__ import annotations

import json
import logging
import re
import threading
from pathlib import Path

import numpy as np
import pytest
import zmq
from _service_fakes import loopback_config
from hypothesis import given, settings
from hypothesis import strategies as st
from protocol_helpers import until

from brimline.daemon.errors import ConfigError, SourceError
from brimline.daemon.records import Estimate
from brimline.daemon.runtime.config import Config
from brimline.daemon.runtime.service import Service
from brimline.daemon.wire import codec
from brimline.drivers.link.frame import make_plan
from brimline.drivers.sources.iq import IqDriver, write_sigmf
from brimline.drivers.sources.iqstream import IqStreamDriver
from brimline.drivers.sources.pushed import PushedDriver
from brimline.drivers.sources.sim import SimDriver

README = Path(__file__).resolve().parents[1] / "README.md"
PLAN = make_plan()
TONES = PLAN.data_tones


class Collector:
    """Runs a driver's ``frames()`` on a thread of its own (as the service does)."""

    def __init__(self, driver) -> None:
        self.driver = driver
        self.got: list[Estimate] = []
        self.error = None
        self.thread = threading.Thread(target=self._run, daemon=True)
        self.thread.start()

    def _run(self):
        try:
            for est in self.driver.frames():
                self.got.append(est)
        except Exception as exc:  # noqa: BLE001 - reported to the test
            self.error = exc

    def stop(self):
        self.driver.close()
        self.thread.join(10)
        assert not self.thread.is_alive() and self.error is None, self.error


def _estimate(frame=0, *, snr=20.0, tones=TONES, plan_id="", **over) -> Estimate:
    n = len(tones)
    snr_db = np.full(n, snr, np.float32)
    fields = dict(frame=frame, time_s=1.0 + frame * 0.01, plan_id=plan_id, tone_index=tones,
                  channel=(10 ** (snr_db / 20)).astype(np.complex64),
                  noise_var=np.ones(n, np.float32), snr_db=snr_db)
    fields.update(over)
    return Estimate(**fields)


def _push(ctx, endpoint):
    s = ctx.socket(zmq.PUSH)
    s.setsockopt(zmq.LINGER, 0)
    s.setsockopt(zmq.SNDHWM, 100_000)
    s.connect(endpoint)
    return s


def _with_header(frames, **change):
    header = json.loads(bytes(frames[1]))
    for path, value in change.items():
        node = header
        keys = path.split("__")
        for k in keys[:-1]:
            node = node[int(k)] if isinstance(node, list) else node[k]
        last = keys[-1]
        if isinstance(node, list):
            node[int(last)] = value
        else:
            node[last] = value
    return [frames[0], json.dumps(header).encode(), *frames[2:]]


class TestPushedEstimates:
    def test_good_estimates_are_accepted_in_order(self, ctx):
        drv = PushedDriver(plan=PLAN, endpoint="tcp://127.0.0.1:0", context=ctx)
        push = _push(ctx, drv.endpoint)
        col = Collector(drv)
        try:
            for k in range(5):
                push.send_multipart(codec.encode(codec.TOPIC_ESTIMATE, _estimate(k)))
            assert until(lambda: len(col.got) == 5)
        finally:
            col.stop()
            push.close()
        assert [e.frame for e in col.got] == list(range(5))
        assert all(e.plan_id == PLAN.plan_id for e in col.got)  # "" means the daemon's plan
        assert drv.counters["frames"] == 5

    def test_each_bad_class_is_dropped_and_counted(self, ctx, caplog):
        drv = PushedDriver(plan=PLAN, endpoint="tcp://127.0.0.1:0", context=ctx,
                           max_message_bytes=64 * 1024)
        push = _push(ctx, drv.endpoint)
        good = codec.encode(codec.TOPIC_ESTIMATE, _estimate(0))
        bad = {
            "oversize": [b"estimate", bytes(good[1])] + [b"\0" * 40_000] * 2,
            "wrong_topic": [b"map", *good[1:]],
            "wrong_dtype": _with_header(good, arrays__3__dtype="<f8"),
            "wrong_shape": _with_header(good, arrays__3__shape=[3]),
            "malformed": _with_header(good, crc32=12345),
            "wrong_type": codec.encode(codec.TOPIC_ESTIMATE, {"frame": 1}),
            "non_finite": codec.encode(codec.TOPIC_ESTIMATE, _estimate(
                1, snr_db=np.full(TONES.size, np.nan, np.float32))),
        }
        wrong_plan = [codec.encode(codec.TOPIC_ESTIMATE, _estimate(2, plan_id="someother")),
                      codec.encode(codec.TOPIC_ESTIMATE, _estimate(2, tones=TONES[:-1]))]
        col = Collector(drv)
        try:
            for frames in bad.values():
                push.send_multipart(frames)
            for frames in wrong_plan:
                push.send_multipart(frames)
            push.send_multipart([b"estimate"])  # header missing
            push.send_multipart([b"estimate", b"\xff\xfe not json"])
            push.send_multipart(codec.encode(codec.TOPIC_ESTIMATE, _estimate(9)))
            assert until(lambda: len(col.got) == 1)
        finally:
            col.stop()
            push.close()
        c = drv.counters
        for reason in set(bad) - {"malformed"}:
            assert c[reason] == 1, reason
        assert c["wrong_plan"] == 2 and c["malformed"] == 3  # bad CRC, no header, not JSON
        assert col.got[0].frame == 9 and c["frames"] == 1

    @settings(max_examples=300)
    @given(st.data())
    def test_any_mutation_is_accepted_or_counted_never_raised(self, data):
        """Header values replaced by any JSON value, payload bytes flipped: ``check`` returns
        an estimate or counts exactly one rejection, and never raises."""
        drv = PushedDriver(plan=PLAN, endpoint=f"inproc://mutate-{id(data)}")
        try:
            good = [bytes(p) for p in codec.encode(codec.TOPIC_ESTIMATE, _estimate(1))]
            header = json.loads(good[1])
            json_value = st.recursive(
                st.none() | st.booleans() | st.integers() | st.floats(allow_nan=False)
                | st.text(max_size=5), lambda inner: st.lists(inner, max_size=3)
                | st.dictionaries(st.text(max_size=3), inner, max_size=3), max_leaves=5)
            where = data.draw(st.sampled_from(["v", "type", "crc32", "fields", "arrays",
                                               "field", "array", "payload"]))
            if where == "field":
                header["fields"][data.draw(st.sampled_from(sorted(header["fields"])))] = \
                    data.draw(json_value)
            elif where == "array":
                spec = header["arrays"][data.draw(st.integers(0, 3))]
                spec[data.draw(st.sampled_from(["name", "dtype", "shape"]))] = \
                    data.draw(json_value)
            elif where != "payload":
                header[where] = data.draw(json_value)
            parts = [good[0], json.dumps(header).encode(), *good[2:]]
            if where == "payload":
                k = data.draw(st.integers(2, len(parts) - 1))
                blob = bytearray(parts[k])
                blob[data.draw(st.integers(0, len(blob) - 1))] ^= 0x5A
                parts[k] = bytes(blob)
            before = sum(drv.counters.values())
            result = drv.check(parts)
            counted = sum(drv.counters.values()) - before
            assert (result is not None and counted == 0) or (result is None and counted == 1)
        finally:
            drv.close()

    def test_a_part_over_maxmsgsize_never_arrives_and_the_driver_goes_on(self, ctx):
        """ZeroMQ's MAXMSGSIZE drops the connection of a sender whose part is too large; the
        sender reconnects and its next good message arrives."""
        drv = PushedDriver(plan=PLAN, endpoint="tcp://127.0.0.1:0", context=ctx,
                           max_message_bytes=4096)
        push = _push(ctx, drv.endpoint)
        col = Collector(drv)
        try:
            push.send_multipart([b"estimate", b"x" * 100_000])

            def resend():
                try:  # while the dropped connection is being made again, PUSH has no peer
                    push.send_multipart(codec.encode(codec.TOPIC_ESTIMATE,
                                                     _estimate(len(col.got))), zmq.NOBLOCK)
                except zmq.Again:
                    pass
            assert until(lambda: len(col.got) >= 1, step=lambda: (resend(), until(
                lambda: bool(col.got), 0.2)))
        finally:
            col.stop()
            push.close()
        assert drv.counters["frames"] >= 1

    def test_a_flood_is_bounded_and_counted(self, ctx):
        drv = PushedDriver(plan=PLAN, endpoint="inproc://flood", context=ctx, queue_messages=4)
        push = _push(ctx, "inproc://flood")
        msg = codec.encode(codec.TOPIC_ESTIMATE, _estimate(0))
        for _ in range(100):  # all queued in the pipe before the driver takes any
            push.send_multipart(msg)
        col = Collector(drv)
        try:
            assert until(lambda: len(col.got) + drv.counters["flood_dropped"] == 100)
        finally:
            col.stop()
            push.close()
        assert drv.counters["flood_dropped"] >= 90 and 1 <= len(col.got) <= 10

    def test_warnings_are_rate_limited(self, ctx):
        now = [0.0]
        drv = PushedDriver(plan=PLAN, endpoint="tcp://127.0.0.1:0", context=ctx,
                           warn_every_s=5.0, clock=lambda: now[0])
        records = []
        handler = logging.Handler()
        handler.emit = records.append
        logger = logging.getLogger("brimline.sources.pushed")
        logger.addHandler(handler)
        try:
            for _ in range(50):
                drv.check([b"map", b"{}"])
            now[0] = 6.0
            drv.check([b"map", b"{}"])
        finally:
            logger.removeHandler(handler)
            drv.close()
        assert drv.counters["wrong_topic"] == 51 and len(records) == 2
        assert "50 rejected since the last warning" in records[1].getMessage()

    def test_busy_endpoint_is_one_error_at_start(self, ctx):
        first = PushedDriver(plan=PLAN, endpoint="tcp://127.0.0.1:0", context=ctx)
        try:
            with pytest.raises(SourceError, match=rf"^driver.pushed.endpoint="
                                                  rf"{re.escape(first.endpoint)}: cannot bind"):
                PushedDriver(plan=PLAN, endpoint=first.endpoint, context=ctx)
        finally:
            first.close()

    @pytest.mark.parametrize("key,value,msg", [
        ("endpoint", "localhost:7345", r"driver.pushed.endpoint='localhost:7345' must be a "
                                       r"ZeroMQ endpoint"),
        ("endpoint", "tcp://127.0.0.1", r"needs a port"),
        ("queue_messages", 0, r"driver.pushed.queue_messages=0 must be in"),
        ("max_message_bytes", 10, r"driver.pushed.max_message_bytes=10 must be in"),
        ("pattern", "req", r"driver.pushed.pattern='req' must be 'pull' or 'sub'"),
    ])
    def test_bad_settings(self, key, value, msg):
        with pytest.raises(ConfigError, match=msg):
            PushedDriver(plan=PLAN, **{key: value})

    def test_config_section_errors_name_the_key(self):
        with pytest.raises(Exception, match=r"endpoint"):
            Config.model_validate({"driver": {"kind": "pushed",
                                              "pushed": {"endpoint": "nowhere"}}})
        cfg = Config.model_validate({"driver": {"kind": "pushed", "pushed": {}}})
        assert cfg.driver.live and cfg.driver.pushed.pattern == "pull"

    def test_readme_sender_runs_as_written(self, ctx):
        """The README's plain-pyzmq sender, with the test's endpoint and the default plan's data
        tones swapped in, delivers five estimates the driver accepts."""
        text = README.read_text()
        code = re.search(r"<!-- snippet: estimate-sender -->\n```python\n(.*?)```", text,
                         re.S).group(1)
        drv = PushedDriver(plan=PLAN, endpoint="tcp://127.0.0.1:0", context=ctx)
        code = code.replace("tcp://127.0.0.1:7347", drv.endpoint)
        code = re.sub(r"^data_tones = .*$", f"data_tones = {TONES.tolist()}", code, flags=re.M)
        col = Collector(drv)
        try:
            exec(code, {})  # noqa: S102 - the README's own snippet
            assert until(lambda: len(col.got) == 5)
        finally:
            col.stop()
        assert all(e.valid and np.allclose(e.snr_db, 20.0) for e in col.got)

    def test_the_service_makes_maps_from_pushed_estimates(self, ctx):
        cfg = loopback_config(driver={"kind": "pushed",
                                      "pushed": {"endpoint": "tcp://127.0.0.1:0"}})
        drv = PushedDriver(plan=PLAN, endpoint="tcp://127.0.0.1:0", context=ctx)
        push = _push(ctx, drv.endpoint)
        with Service(cfg, driver=drv) as svc:
            assert svc.clock_mode == "monotonic"
            k = [0]

            def send():
                push.send_multipart(codec.encode(codec.TOPIC_ESTIMATE, _estimate(
                    k[0], time_s=1.0 + 0.01 * k[0])))
                push.send_multipart([b"estimate", b"junk"])
                k[0] += 1
                svc.step(0.01)
            # A live source on the monotonic clock: on a busy machine the safe map may come
            # first; what counts is that the pushed estimates then make a map of their own.
            assert until(lambda: svc.current_map is not None and not svc.current_map.fallback
                         and drv.counters.get("malformed", 0) >= 1, 60.0, step=send)
            st = svc.publish_status()
        push.close()
        assert st["driver"]["name"] == "pushed" and st["driver"]["counters"]["malformed"] >= 1
        assert not svc.current_map.fallback


# --------------------------------------------------------------------------- raw IQ stream


def _sim_iq(n_frames=8):
    sim = SimDriver(plan=PLAN, realtime=False, profile="epa", snr_db=25.0, seed=4)
    return (0.1 * sim.capture(n_frames, gap_samples=400)).astype(np.complex64)


class TestIqStream:
    @pytest.mark.parametrize("fmt", ["cf32", "ci16"])
    def test_same_iq_gives_the_same_estimates_as_from_a_file(self, ctx, tmp_path, fmt):
        x = _sim_iq()
        datatype = {"cf32": "cf32_le", "ci16": "ci16_le"}[fmt]
        write_sigmf(tmp_path / "cap", x, sample_rate_hz=PLAN.sample_rate_hz, datatype=datatype)
        with IqDriver(plan=PLAN, path=str(tmp_path / "cap")) as f:
            from_file = list(f.frames())
        raw = (tmp_path / "cap.sigmf-data").read_bytes()
        drv = IqStreamDriver(plan=PLAN, endpoint="tcp://127.0.0.1:0", bind=True,
                             pattern="pull", sample_format=fmt, context=ctx)
        push = _push(ctx, drv.endpoint)
        col = Collector(drv)
        width = 8 if fmt == "cf32" else 4
        try:
            step = 3001 * width  # odd-sized messages, as a framework's sink sends them
            for at in range(0, len(raw), step):
                push.send(raw[at:at + step])
            push.send(b"\0" * (4 * PLAN.frame_len * width))  # flushes the last frames
            assert until(lambda: len(col.got) >= len(from_file) - 1)
        finally:
            col.stop()
            push.close()
        n = len(from_file) - 1  # the last frame may be held for the next header
        assert n >= 6
        for a, b in zip(from_file[:n], col.got[:n]):
            assert (a.frame, a.time_s, a.valid, a.header_ok) == (b.frame, b.time_s, b.valid,
                                                                  b.header_ok)
            np.testing.assert_array_equal(a.snr_db, b.snr_db)
            np.testing.assert_array_equal(a.channel, b.channel)

    def test_bad_messages_are_dropped_and_counted(self, ctx):
        drv = IqStreamDriver(plan=PLAN, endpoint="tcp://127.0.0.1:0", bind=True,
                             pattern="pull", context=ctx, max_message_bytes=1 << 20)
        push = _push(ctx, drv.endpoint)
        x = _sim_iq(4).tobytes()
        col = Collector(drv)
        try:
            push.send(b"\0" * 7)  # not whole samples
            push.send_multipart([b"tags", b"\0" * 8])
            push.send(np.array([np.nan, 1.0], "<f4").tobytes())
            push.send(b"\0" * ((1 << 20) - 8) + b"\0" * 16)  # over max_message_bytes
            for at in range(0, len(x), 65536):
                push.send(x[at:at + 65536])
            push.send(b"\0" * (4 * PLAN.frame_len * 8))
            assert until(lambda: len(col.got) >= 3)
        finally:
            col.stop()
            push.close()
        c = drv.counters
        assert c["bad_length"] == 1 and c["multipart"] == 1 and c["non_finite"] == 1
        assert c["oversize"] == 0 or c["oversize"] == 1  # MAXMSGSIZE may cut it first
        assert all(e.header_ok for e in col.got)

    def test_lost_messages_show_as_lost_frames(self, ctx):
        x = _sim_iq(24)
        drv = IqStreamDriver(plan=PLAN, endpoint="tcp://127.0.0.1:0", bind=True,
                             pattern="pull", context=ctx)
        push = _push(ctx, drv.endpoint)
        col = Collector(drv)
        chunk = 2 * PLAN.frame_len
        pieces = [x[i:i + chunk] for i in range(0, x.size, chunk)]
        try:
            for i, piece in enumerate(pieces):
                if i in (4, 5):  # two messages lost on the way
                    continue
                push.send(piece.tobytes())
            push.send(np.zeros(4 * PLAN.frame_len, np.complex64).tobytes())
            assert until(lambda: drv.counters["messages"] == len(pieces) - 1), dict(drv.counters)
            assert drv.counters["lost_frames"] >= 1, dict(drv.counters)
        finally:
            col.stop()
            push.close()
        assert drv.counters["suspected_overflows"] >= 1

    def test_config_section(self):
        cfg = Config.model_validate({"driver": {"kind": "iq_stream",
                                                "iq_stream": {"sample_format": "ci16"}}})
        assert cfg.driver.live and cfg.driver.iq_stream.endpoint == "tcp://127.0.0.1:7348"
        with pytest.raises(Exception, match="sample_format"):
            Config.model_validate({"driver": {"kind": "iq_stream",
                                              "iq_stream": {"sample_format": "cu8"}}})
