"""Hostile input on every socket, key file and endpoint: dropped, counted, named; never a crash.

Sockets bind to 127.0.0.1 on free ports with LINGER 0; waits are polls with generous deadlines
that only catch a hang (no durations are asserted). CURVE keys are made in ``tmp_path``.
"""

from __future__ import annotations

import io
import json
import logging
import os
import socket
import threading
import time
import zlib
from pathlib import Path

import pytest
import zmq
from _service_fakes import ScriptedDriver, loopback_config
from protocol_helpers import ANY_PORT, FakeClock, make_map, until, wifi_like_plan
from rich.console import Console

from brimline.daemon.commands.cli import main
from brimline.daemon.commands.run import end_summary
from brimline.daemon.errors import InputError
from brimline.daemon.net import curve
from brimline.daemon.net.drops import SMALL_MESSAGE_BYTES, DropCounter
from brimline.daemon.net.follower import Follower
from brimline.daemon.net.publisher import MapPublisher, StatusPublisher
from brimline.daemon.runtime.config import load_config
from brimline.daemon.runtime.service import Service
from brimline.daemon.runtime.status import build_status
from brimline.daemon.views.watch import render, watch
from brimline.daemon.wire import codec
from brimline.drivers.link.frame import make_plan


def _header(**changes) -> bytes:
    head = {"v": 1, "type": "dict", "fields": {}, "arrays": [], "crc32": 0}
    head.update(changes)
    return json.dumps(head).encode()


_ZERO4 = b"\0\0\0\0"
_CRC4 = zlib.crc32(_ZERO4)


def _ack(seq, epoch="e1", **kw):
    return codec.encode(codec.TOPIC_ACK, {"epoch": epoch, "seq": seq, "frame": 3,
                                          "time_s": 1.0, **kw})


#: Malformed acknowledgements a hostile local client sends, with the reason each is counted as.
BAD_ACKS = [
    ([b"ack", b"nonsense"], "header_json"),
    ([b"ack", _header(type=["dict"])], "type"),
    ([b"ack", _header(arrays=[{"name": "x", "dtype": ["<f4"], "shape": [1]}], crc32=_CRC4),
      _ZERO4], "dtype"),
    ([b"ack", _header(arrays=[{"name": "x", "dtype": "<f4", "shape": [1] * 100}],
                      crc32=_CRC4), _ZERO4], "shape"),
    ([b"ack", _header(arrays=[{"name": "x", "dtype": "<f4", "shape": [1e30]}], crc32=_CRC4),
      _ZERO4], "shape"),
    ([b"ack", _header(arrays=[{"name": "x", "dtype": "<f4", "shape": [10**30]}],
                      crc32=_CRC4), _ZERO4], "size"),
    ([b"ack", _header(arrays=[{"name": "x", "dtype": "<f4", "shape": [1]}], crc32=1),
      _ZERO4], "checksum"),
    ([b"ack", b'{"v":1,"type":"dict","fields":{"seq":NaN},"arrays":[],"crc32":0}'],
     "header_json"),
    ([b"ack", b"[" * 4000], "header_json"),  # nesting; under the 4 KiB frame ceiling
    ([b"ack", b"\xff\xfe"], "header_json"),
    ([b"ack"], "parts"),
    ([b"ack\n", _header()], "topic"),
    (codec.encode(codec.TOPIC_ACK, make_map(1)), "type"),  # a map where an ack belongs
    (codec.encode(codec.TOPIC_MAP, {"seq": 1, "frame": 1, "time_s": 1.0}), "topic"),
    (codec.encode(codec.TOPIC_ACK, {"seq": "two", "frame": 1, "time_s": 1.0}), "ack_fields"),
    (codec.encode(codec.TOPIC_ACK, {"seq": True, "frame": 1, "time_s": 1.0}), "ack_fields"),
    (_ack(10**18), "forged"),  # a seq never sent
    (_ack(1, epoch="not-ours"), "forged"),  # an epoch not ours
    (_ack(-1), "forged"),
]


@pytest.fixture
def pub(ctx):
    with MapPublisher(map_endpoint=ANY_PORT, snapshot_endpoint=ANY_PORT, ack_endpoint=ANY_PORT,
                      heartbeat_s=0.05, linger_s=0.0, context=ctx, epoch="e1") as p:
        yield p


def _push(ctx, endpoint):
    s = ctx.socket(zmq.PUSH)
    s.setsockopt(zmq.LINGER, 0)
    s.connect(endpoint)
    return s


class TestDropCounter:
    def test_one_warning_per_reason_per_interval_with_the_count_since(self, caplog):
        clock = FakeClock(0.0)
        drops = DropCounter(logging.getLogger("brimline.test"), interval_s=10.0, clock=clock)
        with caplog.at_level(logging.WARNING, logger="brimline.test"):
            for _ in range(5):
                drops.drop("acks", "header_json", "header is not JSON")
            drops.drop("acks", "forged", "seq 10**18")
            clock.t = 9.9
            drops.drop("acks", "header_json", "again")
            clock.t = 10.0
            drops.drop("acks", "header_json", "and again")
        lines = [r.getMessage() for r in caplog.records]
        assert len(lines) == 3
        assert "(header_json)" in lines[0] and "(forged)" in lines[1]
        assert "(6 such messages since the last warning)" in lines[2]
        assert drops.counts() == {"acks": {"header_json": 7, "forged": 1}}
        assert drops.total() == 8 and drops.total("acks") == 8 and drops.total("x") == 0


class TestPublisherSockets:
    def test_every_receiving_socket_has_a_frame_ceiling(self, pub):
        for s in (pub.ack_socket, pub.snapshot_socket, pub._pub):
            assert s.getsockopt(zmq.MAXMSGSIZE) == SMALL_MESSAGE_BYTES

    def test_malformed_and_forged_acks_are_dropped_and_counted_by_reason(self, pub, ctx):
        pub.publish(make_map(1))
        pub.publish(make_map(2))
        push = _push(ctx, pub.ack_endpoint)
        for frames, _reason in BAD_ACKS:
            push.send_multipart(frames)
        push.send_multipart(_ack(2))  # the one true acknowledgement, sent last
        got = []
        assert until(lambda: pub.counters["acks"] == 1,
                     step=lambda: got.extend(pub.poll_acks()), timeout_s=10.0)
        want: dict[str, int] = {}
        for _frames, reason in BAD_ACKS:
            want[reason] = want.get(reason, 0) + 1
        assert pub.protocol_errors == {"acks": want}
        assert [a["seq"] for a in got] == [2]
        assert pub.counters["bad_acks"] == len(BAD_ACKS)
        push.close()

    def test_acks_for_a_primed_map_and_its_predecessors_are_believed(self, pub):
        pub.prime(make_map(40))
        pub.publish(make_map(45))  # a restart: 41..44 were never sent
        assert pub.was_sent("e1", 0) and pub.was_sent("e1", 40) and pub.was_sent("e1", 45)
        assert not pub.was_sent("e1", 42) and not pub.was_sent("e1", 46)
        assert not pub.was_sent("e2", 45) and not pub.was_sent("e1", True)
        pub.publish(make_map(0, epoch="e2"))  # a new epoch forgets the old one
        assert not pub.was_sent("e1", 45) and pub.was_sent("e2", 0)

    def test_bad_snapshot_requests_are_counted_and_answered(self, pub, ctx):
        dealer = ctx.socket(zmq.DEALER)
        dealer.setsockopt(zmq.LINGER, 0)
        dealer.connect(pub.snapshot_endpoint)
        for body in ([b"", b"garbage"], [b"", b"snapshot", b"extra"], [b"\xff" * 1000]):
            dealer.send_multipart(body)
        assert until(lambda: pub.counters["bad_requests"] == 3, step=pub.handle_snapshot)
        assert pub.protocol_errors == {"snapshots": {"request": 3}}
        dealer.close()

    def test_an_oversized_frame_is_refused_before_it_is_buffered(self, pub, ctx):
        pub.publish(make_map(1))
        big = _push(ctx, pub.ack_endpoint)
        big.send_multipart([b"ack", b" " * (4 * SMALL_MESSAGE_BYTES)])
        good = _push(ctx, pub.ack_endpoint)
        good.send_multipart(_ack(1))
        got = []
        assert until(lambda: got, step=lambda: got.extend(pub.poll_acks()), timeout_s=10.0)
        until(lambda: False, 0.2, step=lambda: got.extend(pub.poll_acks()))
        assert [a["seq"] for a in got] == [1]  # the big frame never reached the decoder
        assert pub.protocol_errors == {}
        big.close()
        good.close()

    def test_raw_tcp_junk_does_not_disturb_the_sockets(self, pub, ctx):
        pub.publish(make_map(1))
        for ep in (pub.ack_endpoint, pub.snapshot_endpoint, pub.map_endpoint):
            host, port = ep[len("tcp://"):].rsplit(":", 1)
            with socket.create_connection((host, int(port)), timeout=5) as raw:
                raw.sendall(os.urandom(4096) + b"\xff" * 64 + b"\x00" * 64)
        push = _push(ctx, pub.ack_endpoint)
        push.send_multipart(_ack(1))
        assert until(lambda: pub.counters["acks"] == 1, step=pub.poll_acks, timeout_s=10.0)
        push.close()


class TestFollowerSockets:
    def test_malformed_messages_are_counted_by_socket_and_reason(self, ctx):
        """A fake daemon (XPUB + ROUTER) sends garbage on both follower sockets."""
        xpub, router = ctx.socket(zmq.XPUB), ctx.socket(zmq.ROUTER)
        for s in (xpub, router):
            s.setsockopt(zmq.LINGER, 0)
        mep = f"tcp://127.0.0.1:{xpub.bind_to_random_port('tcp://127.0.0.1')}"
        sep = f"tcp://127.0.0.1:{router.bind_to_random_port('tcp://127.0.0.1')}"
        with Follower(plan=wifi_like_plan(), map_endpoint=mep, snapshot_endpoint=sep,
                      context=ctx) as f:
            for s in (f._sub, f._req):
                assert s.getsockopt(zmq.MAXMSGSIZE) == codec.max_frame_bytes(64)
            subs = set()
            assert until(lambda: {b"\x01map", b"\x01heartbeat"} <= subs,
                         step=lambda: xpub.poll(5) and subs.add(xpub.recv()))
            assert router.poll(5000)
            request = router.recv_multipart()
            router.send_multipart(request[:2] + [b"snapshot", _header(type=["x"])])
            router.send_multipart(request[:2] + codec.encode("status", {"a": 1}))
            router.send_multipart(request[:2] + codec.encode("snapshot", make_map(1)))
            for frames in ([b"map", b"{"], [b"map", _header(v=2)],
                           codec.encode("map", wifi_like_plan()),
                           codec.encode("map", {"seq": 1})):
                xpub.send_multipart(frames)
            xpub.send_multipart(codec.encode("map", make_map(2)))
            assert until(lambda: f.current is not None and f.current.seq == 2,
                         step=lambda: f.poll(0.005), timeout_s=10.0)
            assert f.protocol_errors == {
                "snapshots": {"type": 1, "topic": 1},
                "maps": {"header_json": 1, "version": 1, "type": 1, "topic": 1}}
            assert f.counters["malformed"] == 6
        xpub.close()
        router.close()


class TestWatchSocket:
    def test_garbage_on_the_status_stream_is_counted_and_the_status_shown(self, ctx):
        sp = StatusPublisher(endpoint=ANY_PORT, rate_hz=50.0, hwm=100, context=ctx)
        stop = threading.Event()
        drops = DropCounter(logging.getLogger("brimline.test"))

        def feed():
            while not stop.is_set():
                for frames in ([b"status", b"{"], codec.encode("status", make_map(1)),
                               [b"status", _header(arrays="x")]):
                    sp._pub.send_multipart(frames)
                if drops.total() >= 3:
                    sp.publish({"type": "status", "time_s": 1.0, "frames": {}})
                time.sleep(0.01)

        out = io.StringIO()
        with sp:
            t = threading.Thread(target=feed)
            t.start()
            try:
                rc = watch(sp.endpoint, once=True, duration_s=20.0, out=out, drops=drops)
            finally:
                stop.set()
                t.join(5)
        assert rc == 0 and "brimline watch" in out.getvalue()
        counts = drops.counts()["status"]
        assert set(counts) == {"header_json", "type", "header"}

    def test_one_key_without_the_other_is_refused(self, tmp_path):
        with pytest.raises(InputError, match="CURVE needs both"):
            watch("tcp://127.0.0.1:1", once=True, duration_s=0.1,
                  curve_server_key=tmp_path / "x.key")


# --------------------------------------------------------------------------- key files


@pytest.fixture
def pair(tmp_path):
    public, secret = curve.make_keypair(tmp_path / "k", "daemon")
    return public, secret


def _edit_key(path: Path, name: str, value: str, out: Path) -> Path:
    lines = []
    for line in path.read_text().splitlines():
        if line.strip().startswith(name):
            line = f'    {name} = "{value}"'
        lines.append(line)
    out.write_text("\n".join(lines) + "\n")
    return out


def _bad_key_files(tmp_path: Path, public: Path, secret: Path) -> list[tuple[Path, str]]:
    """(file, the words its error must contain) for every malformed key file tried."""
    sec = curve.load_keypair(secret)
    other_public, other_secret = curve.make_keypair(tmp_path / "other", "other")
    other = curve.load_keypair(other_secret)
    d = tmp_path / "bad"
    d.mkdir()
    cases = [
        (_edit_key(secret, "secret-key", sec.secret.decode()[:20], d / "short.key_secret"),
         "secret key has 20 characters"),
        (_edit_key(secret, "secret-key", "", d / "empty_secret.key_secret"),
         "secret key has 0 characters"),
        (_edit_key(public, "public-key", "~" * 40, d / "tilde.key"), "not Z85"),
        (_edit_key(public, "public-key", "#" * 40, d / "overflow.key"),
         "exceeds 32 bits"),
        (_edit_key(public, "public-key", sec.public.decode() + "abcde", d / "long.key"),
         "has 45 characters"),
        (_edit_key(secret, "public-key", other.public.decode(), d / "mixed.key_secret"),
         "not the one of the secret key"),
        (d / "missing.key", "cannot read CURVE key"),
        (d, "not a regular file"),
        (d / "empty.key", "no CURVE public key"),
        (d / "binary.key", "public key is not ASCII"),
        (d / "noequals.key", "has no '='"),
        (d / "twice.key", "appears twice"),
        (d / "huge.key", "too large"),
    ]
    (d / "empty.key").write_bytes(b"")
    (d / "binary.key").write_bytes(b'public-key = "\xff\xfe' + b"a" * 38 + b'"\n')
    (d / "noequals.key").write_text("curve\n    public-key\n")
    (d / "twice.key").write_text(public.read_text() + public.read_text())
    (d / "huge.key").write_bytes(b"#" * (1 << 20))
    if hasattr(os, "mkfifo"):  # opening a FIFO would wait for a writer for ever
        os.mkfifo(d / "fifo.key")
        cases.append((d / "fifo.key", "not a regular file"))
    return cases


class TestKeyFiles:
    def test_good_pair_loads(self, pair):
        public, secret = pair
        p = curve.load_keypair(secret)
        assert curve.load_keypair(public).public == p.public and p.secret is not None

    def test_every_malformed_key_file_is_one_line_naming_it(self, tmp_path, pair):
        for path, words in _bad_key_files(tmp_path, *pair):
            with pytest.raises(InputError) as info:
                curve.load_keypair(path)
            msg = str(info.value)
            assert msg.startswith(str(path)) and words in msg and "\n" not in msg, msg

    def test_a_bad_secret_key_fails_the_publisher_without_a_hang(self, tmp_path, pair):
        """The context is terminated while the exception (and its traceback) is alive, as the
        service does: before the fix, term() waited for ever for a socket left open."""
        bad = _edit_key(pair[1], "secret-key", "abc", tmp_path / "bad.key_secret")
        result = {}

        def attempt():
            ctx = zmq.Context()
            try:
                MapPublisher(map_endpoint=ANY_PORT, snapshot_endpoint=ANY_PORT,
                             ack_endpoint=ANY_PORT, linger_s=0, context=ctx,
                             curve_secret_key=bad)
            except InputError as exc:
                result["error"] = str(exc)
                ctx.term()
                result["terminated"] = True

        t = threading.Thread(target=attempt, daemon=True)
        t.start()
        t.join(30)  # only catches a hang
        assert result.get("terminated"), result
        assert "secret key has 3 characters" in result["error"]

    def test_one_bad_client_key_is_named_and_the_good_ones_still_work(self, tmp_path, ctx,
                                                                      caplog):
        curve.make_keypair(tmp_path / "daemon", "daemon")
        curve.make_keypair(tmp_path / "clients", "tx")
        (tmp_path / "clients" / "broken.key").write_text('public-key = "too short"\n')
        with caplog.at_level(logging.WARNING, logger="brimline.curve"), \
                MapPublisher(map_endpoint=ANY_PORT, snapshot_endpoint=ANY_PORT,
                             ack_endpoint=None, linger_s=0, context=ctx, heartbeat_s=0.02,
                             curve_secret_key=tmp_path / "daemon/daemon.key_secret",
                             curve_clients_dir=tmp_path / "clients") as pub:
            assert len(pub.curve.client_key_problems) == 1
            assert "broken.key" in pub.curve.client_key_problems[0]
            assert any("broken.key" in r.getMessage() for r in caplog.records)
            pub.publish(make_map(1))
            with Follower(plan=wifi_like_plan(), map_endpoint=pub.map_endpoint,
                          snapshot_endpoint=pub.snapshot_endpoint, context=ctx,
                          curve_server_key=tmp_path / "daemon/daemon.key",
                          curve_client_key=tmp_path / "clients/tx.key_secret") as good:
                assert until(lambda: good.current is not None,
                             step=lambda: (pub.handle_snapshot(), good.poll(0.005)),
                             timeout_s=10.0)

    def test_a_clients_dir_of_only_bad_keys_is_an_error(self, tmp_path, ctx):
        curve.make_keypair(tmp_path / "daemon", "daemon")
        (tmp_path / "clients").mkdir()
        (tmp_path / "clients" / "a.key").write_text("nothing\n")
        with pytest.raises(InputError, match=r"no usable client public keys .*a\.key"):
            MapPublisher(map_endpoint=ANY_PORT, snapshot_endpoint=ANY_PORT, ack_endpoint=None,
                         linger_s=0, context=ctx,
                         curve_secret_key=tmp_path / "daemon/daemon.key_secret",
                         curve_clients_dir=tmp_path / "clients")

    def test_follower_with_a_bad_key_fails_cleanly(self, tmp_path, pair, ctx):
        bad = _edit_key(pair[0], "public-key", "~" * 40, tmp_path / "bad.key")
        with pytest.raises(InputError, match="bad.key: public key holds characters"):
            Follower(plan=wifi_like_plan(), map_endpoint="tcp://127.0.0.1:1",
                     snapshot_endpoint="tcp://127.0.0.1:2", context=ctx,
                     curve_server_key=bad, curve_client_key=pair[1])


class TestEndpoints:
    @pytest.mark.parametrize("endpoint, local", [
        ("tcp://127.0.0.1:7341", True), ("tcp://127.8.9.10:1", True),
        ("tcp://localhost:7341", True), ("tcp://[::1]:7341", True), ("ipc:///tmp/x", True),
        ("inproc://x", True), ("tcp://*:7341", False), ("tcp://0.0.0.0:7341", False),
        ("tcp://192.168.1.4:7341", False), ("tcp://eth0:7341", False),
        ("tcp://[::]:7341", False), ("tcp://127.0.0.1.evil:1", False),
    ])
    def test_loopback(self, endpoint, local):
        assert curve.is_loopback_endpoint(endpoint) is local

    def test_warnings_name_key_and_endpoint_only_without_curve(self):
        eps = {"publish.map_endpoint": "tcp://*:7341", "publish.ack_endpoint": None,
               "status.endpoint": "tcp://127.0.0.1:7343"}
        (line,) = curve.exposed_endpoints(eps, curve_on=False)
        assert line.startswith("publish.map_endpoint=tcp://*:7341 is reachable")
        assert curve.exposed_endpoints(eps, curve_on=True) == []


# --------------------------------------------------------------------------- CLI and service


def _write_config(tmp_path: Path, publish: str = "", status: str = "",
                  realtime: bool = False) -> Path:
    p = tmp_path / "daemon.yaml"
    p.write_text(f"""
driver:
  kind: sim
  sim:
    realtime: {'true' if realtime else 'false'}
    max_frames: 160
    profile: awgn
    doppler_hz: 0.0
    snr_db: 27.0
publish:
  map_endpoint: tcp://127.0.0.1:0
  snapshot_endpoint: tcp://127.0.0.1:0
  ack_endpoint: tcp://127.0.0.1:0
  linger_s: 0.0
{publish}
status:
  endpoint: {status or 'tcp://127.0.0.1:0'}
""")
    return p


class TestRunCheck:
    def test_bad_secret_key_is_one_line_and_exit_2(self, tmp_path, capsys):
        assert main(["keys", str(tmp_path / "keys"), "--name", "daemon"]) == 0
        good = tmp_path / "keys/daemon.key_secret"
        _edit_key(good, "secret-key", "short", tmp_path / "keys/cut.key_secret")
        cfg = _write_config(tmp_path, "  curve_secret_key: keys/cut.key_secret")
        capsys.readouterr()
        assert main(["run", "--config", str(cfg), "--check"]) == 2
        err = capsys.readouterr().err
        assert err.count("\n") == 1 and "cut.key_secret: secret key has 5 characters" in err

    def test_bad_client_key_and_exposed_endpoint_are_warnings(self, tmp_path, capsys):
        assert main(["keys", str(tmp_path / "keys"), "--name", "daemon"]) == 0
        assert main(["keys", str(tmp_path / "clients"), "--name", "tx"]) == 0
        (tmp_path / "clients/zz.key").write_text("public-key = 'x'\n")
        cfg = _write_config(tmp_path, "  curve_secret_key: keys/daemon.key_secret\n"
                                      "  curve_clients_dir: clients")
        capsys.readouterr()
        assert main(["run", "--config", str(cfg), "--check"]) == 0
        out = capsys.readouterr()
        assert "OK" in out.out
        (line,) = out.err.splitlines()
        assert "warning" in line and "zz.key: public key has 1 characters" in line

        cfg = _write_config(tmp_path, status="tcp://*:0")
        assert main(["run", "--config", str(cfg), "--check"]) == 0
        (line,) = capsys.readouterr().err.splitlines()
        assert "status.endpoint=tcp://*:0 is reachable from other hosts without CURVE" in line

    def test_missing_clients_dir_is_exit_2(self, tmp_path, capsys):
        main(["keys", str(tmp_path / "keys"), "--name", "daemon"])
        cfg = _write_config(tmp_path, "  curve_secret_key: keys/daemon.key_secret\n"
                                      "  curve_clients_dir: nowhere")
        capsys.readouterr()
        assert main(["run", "--config", str(cfg), "--check"]) == 2
        assert "nowhere: CURVE clients directory does not exist" in capsys.readouterr().err


def _pump(svc, *, until, timeout_s, followers=()):
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        if until():
            return True
        svc.step(0.005)
        for f in followers:
            f.poll(0)
    return until()


class TestCurveEndToEnd:
    def test_sim_transmitter_follower_and_watch_work_with_keys(self, tmp_path, capsys):
        """Keys from ``brimline keys``; a clients directory with the watcher's key and one
        broken file. The simulated transmitter follows (and acknowledges) maps over CURVE, a
        watcher with keys sees the status, one without keys sees nothing."""
        for d, name in (("keys", "daemon"), ("clients", "watcher")):
            assert main(["keys", str(tmp_path / d), "--name", name]) == 0
        (tmp_path / "clients/broken.key").write_text("junk\n")
        # Real time: the simulated transmitter follows over the sockets (a fast simulation runs
        # in lockstep and hands maps over directly).
        cfg = load_config(_write_config(tmp_path, "  curve_secret_key: keys/daemon.key_secret\n"
                                                  "  curve_clients_dir: clients", realtime=True))
        results = {}

        def look(name, **keys):
            results[name] = watch(svc.endpoints["status"], once=True, duration_s=15.0 if keys
                                  else 1.0, out=io.StringIO(), **keys)

        with Service(cfg) as svc:
            watchers = [threading.Thread(target=look, args=("keyed",), kwargs=dict(
                curve_server_key=tmp_path / "keys/daemon.key",
                curve_client_key=tmp_path / "clients/watcher.key_secret")),
                threading.Thread(target=look, args=("plain",))]
            for t in watchers:
                t.start()
            assert _pump(svc, until=lambda: svc.acks.get("followers", {}).get("count", 0) >= 2
                         and len(results) == 2, timeout_s=60.0)
            follower = svc._provider.follower
            assert follower.current is not None and follower.counters["maps"] >= 2
            st = svc.status()
            assert st["protocol_errors"] == {}
            assert 0 <= st["acks"]["followers"]["seq"] <= svc.current_map.seq
        for t in watchers:
            t.join(20)
        assert results == {"keyed": 0, "plain": 1}


class TestHostileClients:
    def test_daemon_under_a_mix_of_hostile_clients_delivers_every_map(self, ctx):
        """Garbage and forged acks, bad snapshot requests, raw TCP junk, an oversized frame and
        a subscriber that never reads, while a good follower must adopt every map in order.
        Bounded by message counts; timing figures are in tests/bench/bench_hostile.py."""
        cfg = loopback_config()
        plan = make_plan(**cfg.link.model_dump())
        gate = threading.Event()
        drv = ScriptedDriver(plan, frames=300, frame_s=0.01, gate=gate,
                             fades=[(0.8, 20, 59, 15.0), (1.6, 100, 140, 12.0)])
        adopted = []
        with Service(cfg, driver=drv, context=ctx) as svc:
            eps = svc.endpoints
            f2 = None
            try:
                f2 = Follower(plan=plan, map_endpoint=eps["maps"],
                              snapshot_endpoint=eps["snapshots"], ack_endpoint=eps["acks"],
                              bits=list(cfg.loading.bits), budget_db=cfg.loading.budget_db,
                              cap_db=cfg.loading.cap_db, context=ctx,
                              on_map=lambda m: adopted.append(m.seq))
                assert _pump(svc, until=lambda: f2.synced and f2.last_heartbeat is not None,
                             timeout_s=10.0, followers=[f2])
                pushes = [_push(ctx, eps["acks"]) for _ in range(3)]
                dealer = ctx.socket(zmq.DEALER)
                dealer.setsockopt(zmq.LINGER, 0)
                dealer.connect(eps["snapshots"])
                idle = ctx.socket(zmq.SUB)  # subscribes and never reads
                idle.setsockopt(zmq.LINGER, 0)
                idle.setsockopt(zmq.RCVHWM, 1)
                idle.setsockopt(zmq.SUBSCRIBE, b"")
                idle.connect(eps["maps"])
                pushes[2].send_multipart([b"ack", b" " * (1 << 20)])
                # Raw junk goes to the snapshot socket: libzmq reads bytes that are no ZMTP 3
                # greeting as ZMTP 1.0 frames, so junk may become (counted) messages there, and
                # the ack count below stays exact.
                host, port = eps["snapshots"][len("tcp://"):].rsplit(":", 1)
                gate.set()
                rounds = 0
                sent = 0

                def hostile_round():
                    nonlocal rounds, sent
                    rounds += 1
                    for frames, _reason in BAD_ACKS:
                        pushes[rounds % 2].send_multipart(
                            _ack(10**18, epoch=svc.epoch) if _reason == "forged" else frames)
                        sent += 1
                    dealer.send_multipart([b"", b"snapshot", b"more"])
                    if rounds % 10 == 0:
                        with socket.create_connection((host, int(port)), timeout=5) as raw:
                            raw.sendall(os.urandom(512))
                    svc.step(0.002)
                    follow()

                def follow():  # the good transmitter acknowledges what it adopts
                    m = f2.poll(0)
                    if m is not None:
                        f2.ack(m.effective_frame, m.created_s)

                done = lambda: (svc.driver_state == "ended" and not svc._pending()
                                and f2.current is not None
                                and f2.current.seq == svc.current_map.seq)
                deadline = time.monotonic() + 60.0  # only catches a hang
                while not done() and time.monotonic() < deadline:
                    hostile_round()
                for _ in range(50):  # let the last garbage and acks reach the daemon
                    svc.step(0.002)
                    follow()
                assert done()
                st = svc.publish_status()
                errors = st["protocol_errors"]
                assert errors["acks"]["forged"] > 0 and errors["acks"]["header_json"] > 0
                assert errors["snapshots"]["request"] > 0
                assert sum(errors["acks"].values()) <= sent
                assert st["acks"]["followers"]["seq"] == svc.current_map.seq  # not 10**18
                assert adopted == list(range(adopted[0], svc.current_map.seq + 1))
                assert adopted[0] == 0 and f2.counters["gaps"] == 0
                for s in (*pushes, dealer, idle):
                    s.close()
            finally:
                if f2 is not None:
                    f2.close()


class TestWatchCli:
    def test_key_options_go_together(self, tmp_path, capsys):
        assert main(["watch", "--once", "--duration", "0.1", "--daemon-key", "x.key"]) == 2
        assert "--daemon-key and --own-key go together" in capsys.readouterr().err

    def test_a_bad_key_file_is_one_line(self, tmp_path, capsys):
        main(["keys", str(tmp_path), "--name", "w"])
        (tmp_path / "d.key").write_text('public-key = "abc"\n')
        assert main(["watch", "--once", "--duration", "0.1", "--daemon-key",
                     str(tmp_path / "d.key"), "--own-key", str(tmp_path / "w.key_secret")]) == 2
        err = capsys.readouterr().err
        assert err.count("\n") == 1 and "d.key: public key has 3 characters" in err


def test_dropped_messages_reach_the_view_and_the_run_summary():
    st = build_status(time_s=1.0, epoch="e", driver={"name": "sim", "state": "running"},
                      frames={}, estimate_age_s=None, tone_index=None, snr_db=None,
                      protocol_errors={"acks": {"forged": 3, "header_json": 2}})
    assert st["protocol_errors"] == {"acks": {"forged": 3, "header_json": 2}}
    console = Console(file=io.StringIO(), width=120, color_system=None)
    console.print(render(st))
    assert "daemon dropped acks forged 3, acks header_json 2" in console.file.getvalue()
    assert "dropped msgs    acks forged 3, acks header_json 2" in end_summary(st)
