"""MapPublisher and StatusPublisher on real sockets (127.0.0.1, free ports, LINGER 0)."""

import re
import threading
import time
from pathlib import Path

import numpy as np
import pytest
import zmq
import zmq.auth
from protocol_helpers import ANY_PORT, make_map, until, wifi_like_plan

from brimline.daemon.commands.cli import main
from brimline.daemon.errors import InputError, ProtocolError
from brimline.daemon.net.curve import load_keypair, make_keypair
from brimline.daemon.net.follower import Follower
from brimline.daemon.net.publisher import MapPublisher, StatusPublisher
from brimline.daemon.records import LoadMap
from brimline.daemon.wire import codec

README = Path(__file__).resolve().parents[1] / "README.md"


@pytest.fixture
def pub(ctx):
    with MapPublisher(map_endpoint=ANY_PORT, snapshot_endpoint=ANY_PORT, ack_endpoint=ANY_PORT,
                      heartbeat_s=0.05, linger_s=0.0, context=ctx, epoch="e1") as p:
        yield p


def _follower(pub, ctx, **kw):
    return Follower(plan=wifi_like_plan(), map_endpoint=pub.map_endpoint,
                    snapshot_endpoint=pub.snapshot_endpoint, ack_endpoint=pub.ack_endpoint,
                    context=ctx, **kw)


def _rss_bytes() -> int:
    with open("/proc/self/status") as f:
        for line in f:
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) * 1024
    return 0


class TestEndpoints:
    def test_binds_loopback_on_free_ports(self, pub):
        for ep in (pub.map_endpoint, pub.snapshot_endpoint, pub.ack_endpoint):
            assert re.fullmatch(r"tcp://127\.0\.0\.1:\d+", ep) and not ep.endswith(":0")
        assert len({pub.map_endpoint, pub.snapshot_endpoint, pub.ack_endpoint}) == 3

    def test_address_in_use_names_the_endpoint(self, pub, ctx):
        with pytest.raises(ProtocolError, match=re.escape(f"cannot bind {pub.map_endpoint}")):
            MapPublisher(map_endpoint=pub.map_endpoint, snapshot_endpoint=ANY_PORT,
                         ack_endpoint=None, linger_s=0, context=ctx)

    def test_close_is_idempotent_and_use_after_close_fails(self, ctx):
        p = MapPublisher(map_endpoint=ANY_PORT, snapshot_endpoint=ANY_PORT, ack_endpoint=None,
                         linger_s=0, context=ctx)
        p.close()
        p.close()
        with pytest.raises(RuntimeError, match="closed"):
            p.publish(make_map(1))

    def test_private_context_is_terminated(self):
        p = MapPublisher(map_endpoint=ANY_PORT, snapshot_endpoint=ANY_PORT, ack_endpoint=None,
                         linger_s=0)
        p.close()
        assert p.context.closed


class TestOrder:
    def test_seq_must_increase_within_an_epoch(self, pub):
        pub.publish(make_map(5))
        with pytest.raises(ValueError, match="seq=5 is not greater than the last published seq=5"):
            pub.publish(make_map(5))
        with pytest.raises(ValueError, match="seq=4"):
            pub.prime(make_map(4))
        pub.publish(make_map(6))
        pub.publish(make_map(0, epoch="e2"))  # a new epoch starts a new order
        assert pub.current.epoch == "e2" and pub.counters["maps"] == 3

    def test_publish_returns_the_frames_sent(self, pub):
        frames = pub.publish(make_map(1))
        assert codec.decode(frames)[1].seq == 1


class TestHeartbeat:
    def test_tick_schedule(self, pub):
        assert pub.tick(10.0) == pytest.approx(0.05)
        assert pub.tick(10.02) == pytest.approx(0.03)
        assert pub.counters["heartbeats"] == 1
        pub.tick(10.05)
        assert pub.counters["heartbeats"] == 2

    def test_heartbeat_carries_epoch_and_seq(self, pub, ctx):
        sub = ctx.socket(zmq.SUB)
        sub.setsockopt(zmq.LINGER, 0)
        sub.setsockopt(zmq.SUBSCRIBE, b"heartbeat")
        sub.connect(pub.map_endpoint)
        pub.publish(make_map(7))
        got = []

        def step():
            pub.heartbeat(1.5)
            if sub.poll(10):
                got.append(codec.decode(sub.recv_multipart()))
        assert until(lambda: got, step=step)
        topic, body = got[0]
        assert topic == "heartbeat"
        assert body == {"epoch": "e1", "seq": 7, "time_s": 1.5, "interval_s": 0.05}


class TestSnapshot:
    def _ask(self, pub, ctx, frames):
        req = ctx.socket(zmq.DEALER)
        req.setsockopt(zmq.LINGER, 0)
        req.connect(pub.snapshot_endpoint)
        req.send_multipart(frames)
        reply = []

        def step():
            pub.handle_snapshot()
            if req.poll(10):
                reply.extend(req.recv_multipart())
        assert until(lambda: reply, step=step)
        req.close()
        return reply

    def test_before_any_map(self, pub, ctx):
        reply = self._ask(pub, ctx, [b"", b"snapshot"])
        assert reply[0] == b""
        assert codec.decode(reply[1:]) == ("snapshot", {"epoch": "e1", "seq": -1})

    def test_current_map_and_dealer_without_delimiter(self, pub, ctx):
        pub.publish(make_map(3))
        topic, m = codec.decode(self._ask(pub, ctx, [b"snapshot"]))
        assert topic == "snapshot" and isinstance(m, LoadMap) and m.seq == 3

    def test_bad_request_gets_an_error(self, pub, ctx):
        reply = self._ask(pub, ctx, [b"", b"gimme"])
        assert "error" in codec.decode(reply[1:])[1]
        assert pub.counters["bad_requests"] == 1

    def test_late_joiner_gets_the_current_map_from_the_snapshot(self, pub, ctx):
        """A follower that joins after three maps gets the latest one (by snapshot) and none
        of the older ones; how long that takes is the benchmark's ``late_join_ms``."""
        for seq in range(1, 4):
            pub.publish(make_map(seq))
        with _follower(pub, ctx) as f:
            assert until(lambda: f.current is not None,
                         step=lambda: (pub.handle_snapshot(), f.poll(0.005)))
            assert f.current.seq == 3 and f.counters["maps"] == 1


class TestAcks:
    def test_follower_ack_reaches_the_daemon(self, pub, ctx):
        pub.publish(make_map(2))
        with _follower(pub, ctx) as f:
            assert until(lambda: f.current is not None,
                         step=lambda: (pub.handle_snapshot(), f.poll(0.005)))
            assert f.ack(frame=40, time_s=2.5)
            acks = []
            assert until(lambda: acks, step=lambda: acks.extend(pub.poll_acks()))
        assert acks == [{"epoch": "e1", "seq": 2, "frame": 40, "time_s": 2.5}]

    def test_malformed_ack_is_counted(self, pub, ctx):
        push = ctx.socket(zmq.PUSH)
        push.setsockopt(zmq.LINGER, 0)
        push.connect(pub.ack_endpoint)
        push.send_multipart([b"ack", b"nonsense"])
        push.send_multipart(codec.encode("ack", {"seq": "two"}))
        assert until(lambda: pub.counters["bad_acks"] == 2, step=pub.poll_acks)
        push.close()


class TestStatus:
    def test_due_follows_the_rate(self, ctx):
        with StatusPublisher(endpoint=ANY_PORT, rate_hz=10, context=ctx) as sp:
            assert [sp.due(t) for t in (0.0, 0.05, 0.1, 0.15, 0.2, 0.9, 0.95)] == \
                [True, False, True, False, True, True, False]

    def test_status_seq_is_added(self, ctx):
        with StatusPublisher(endpoint=ANY_PORT, context=ctx) as sp:
            sub = ctx.socket(zmq.SUB)
            sub.setsockopt(zmq.LINGER, 0)
            sub.setsockopt(zmq.SUBSCRIBE, b"")
            sub.connect(sp.endpoint)
            got = []

            def step():
                sp.publish({"state": "tracking"})
                if sub.poll(10):
                    got.append(codec.decode(sub.recv_multipart())[1])
            assert until(lambda: len(got) >= 2, step=step)
            assert got[0]["state"] == "tracking"
            assert got[1]["status_seq"] > got[0]["status_seq"]

    def test_stuck_status_subscriber_costs_the_map_path_nothing(self, pub, ctx):
        """A status subscriber that never reads: 100 MB of status later, every map still reaches
        a follower, in order; every status publish returns (sent or counted as dropped; a
        blocking send would hang here), and the process memory stays flat (the send queue is
        bounded by the high-water mark, 10 messages; with a high-water mark of 100000 the same
        traffic grows the process by about 100 MB, measured when writing this). The map latency
        and the longest status send in this situation are benchmark figures
        (``stuck_status_map_p99_ms``, ``stuck_status_send_max_ms``)."""
        with StatusPublisher(endpoint=ANY_PORT, hwm=10, context=ctx) as sp:
            stuck = ctx.socket(zmq.SUB)
            stuck.setsockopt(zmq.LINGER, 0)
            stuck.setsockopt(zmq.RCVHWM, 10)
            stuck.setsockopt(zmq.RCVBUF, 65536)
            stuck.setsockopt(zmq.SUBSCRIBE, b"")
            stuck.connect(sp.endpoint)
            with _follower(pub, ctx) as f:
                pub.publish(make_map(1))
                assert until(lambda: f.current is not None,
                             step=lambda: (pub.handle_snapshot(), f.poll(0.005)))
                for i in range(200):  # fill every queue on the way to the stuck subscriber
                    sp.publish({"spectrum": np.full(2500, float(i))})
                rss0 = _rss_bytes()
                for seq in range(2, 52):
                    for i in range(100):
                        blob = np.full(2500, float(i))  # 20 kB, fresh (no shared buffers)
                        sp.publish({"spectrum": blob})
                    pub.publish(make_map(seq))
                    assert until(lambda: f.current.seq == seq, step=lambda: f.poll(0.001))
                grown = _rss_bytes() - rss0
        assert f.current.seq == 51 and f.counters["gaps"] == 0
        assert sp.counters["sent"] + sp.counters["dropped"] == 5200
        assert grown < 20e6, f"memory grew by {grown / 1e6:.1f} MB for 100 MB of status"


class TestCurve:
    @pytest.fixture
    def keys(self, tmp_path):
        make_keypair(tmp_path / "daemon", "daemon")
        make_keypair(tmp_path / "clients", "tx")
        make_keypair(tmp_path / "strangers", "mallory")
        return tmp_path

    def test_only_authorised_clients_get_maps(self, keys, ctx):
        with MapPublisher(map_endpoint=ANY_PORT, snapshot_endpoint=ANY_PORT, ack_endpoint=None,
                          linger_s=0, context=ctx, heartbeat_s=0.02,
                          curve_secret_key=str(keys / "daemon/daemon.key_secret"),
                          curve_clients_dir=str(keys / "clients")) as pub:
            pub.publish(make_map(1))
            good = _follower(pub, ctx, curve_server_key=keys / "daemon/daemon.key",
                             curve_client_key=keys / "clients/tx.key_secret")
            stranger = _follower(pub, ctx, curve_server_key=keys / "daemon/daemon.key",
                                 curve_client_key=keys / "strangers/mallory.key_secret")
            plain = ctx.socket(zmq.SUB)
            plain.setsockopt(zmq.LINGER, 0)
            plain.setsockopt(zmq.SUBSCRIBE, b"")
            plain.connect(pub.map_endpoint)
            plain_got = []

            def step():
                pub.handle_snapshot()
                pub.heartbeat(0.0)
                good.poll(0.002)
                stranger.poll(0.002)
                if plain.poll(0):
                    plain_got.append(plain.recv_multipart())
            assert until(lambda: good.current is not None and good.counters["heartbeats"] > 3,
                         step=step)
            until(lambda: False, 0.3, step=step)  # give the others every chance
            assert stranger.current is None and stranger.counters["heartbeats"] == 0
            assert plain_got == []
            good.close()
            stranger.close()

    def test_status_shares_the_curve_setup(self, keys, ctx):
        from brimline.daemon.net.curve import apply_client
        with MapPublisher(map_endpoint=ANY_PORT, snapshot_endpoint=ANY_PORT, ack_endpoint=None,
                          linger_s=0, context=ctx,
                          curve_secret_key=str(keys / "daemon/daemon.key_secret"),
                          curve_clients_dir=str(keys / "clients")) as pub, \
                StatusPublisher(endpoint=ANY_PORT, curve=pub.curve) as sp:
            watchers = {}
            for name, secret in (("tx", keys / "clients/tx.key_secret"),
                                 ("mallory", keys / "strangers/mallory.key_secret"),
                                 ("plain", None)):
                s = ctx.socket(zmq.SUB)
                s.setsockopt(zmq.LINGER, 0)
                s.setsockopt(zmq.SUBSCRIBE, b"")
                if secret is not None:
                    apply_client(s, server_key_file=keys / "daemon/daemon.key",
                                 client_secret_file=secret)
                s.connect(sp.endpoint)
                watchers[name] = (s, [])

            def step():
                sp.publish({"state": "tracking"})
                for s, got in watchers.values():
                    if s.poll(1):
                        got.append(s.recv_multipart())
            assert until(lambda: len(watchers["tx"][1]) > 3, step=step)
            until(lambda: False, 0.2, step=step)
            assert watchers["mallory"][1] == [] and watchers["plain"][1] == []
            for s, _ in watchers.values():
                s.close()
        with pytest.raises(ValueError, match="another zmq.Context"):
            with MapPublisher(map_endpoint=ANY_PORT, snapshot_endpoint=ANY_PORT,
                              ack_endpoint=None, linger_s=0, context=ctx,
                              curve_secret_key=str(keys / "daemon/daemon.key_secret")) as pub:
                other = zmq.Context()
                try:
                    StatusPublisher(endpoint=ANY_PORT, curve=pub.curve, context=other)
                finally:
                    other.term()

    def test_server_needs_a_secret_key_file(self, keys, ctx):
        with pytest.raises(InputError, match="holds no secret key"):
            MapPublisher(map_endpoint=ANY_PORT, snapshot_endpoint=ANY_PORT, ack_endpoint=None,
                         linger_s=0, context=ctx, curve_secret_key=keys / "daemon/daemon.key")

    def test_brimline_keys_creates_usable_keys(self, tmp_path, capsys):
        """CURVE keys are 32 bytes, written as 40 Z85 characters (ZeroMQ RFC 32/Z85)."""
        assert main(["keys", str(tmp_path / "k"), "--name", "site-a"]) == 0
        pair = load_keypair(tmp_path / "k/site-a.key_secret")
        assert len(pair.public) == 40 and len(pair.secret) == 40
        assert len(zmq.utils.z85.decode(pair.public)) == 32
        assert zmq.curve_public(pair.secret) == pair.public  # the pair belongs together
        assert (tmp_path / "k/site-a.key_secret").stat().st_mode & 0o077 == 0
        assert "site-a.key" in capsys.readouterr().out
        assert main(["keys", str(tmp_path / "k"), "--name", "site-a"]) == 2
        assert "never overwritten" in capsys.readouterr().err


def test_plain_pyzmq_snippet_in_readme(pub):
    """The README's decoder runs as written (only the endpoints are swapped for the test's free
    ports) against a MapPublisher."""
    text = README.read_text()
    code = re.search(r"<!-- snippet: plain-decoder -->\n```python\n(.*?)```", text, re.S).group(1)
    code = code.replace("tcp://127.0.0.1:7341", pub.map_endpoint)
    code = code.replace("tcp://127.0.0.1:7342", pub.snapshot_endpoint)
    pub.publish(make_map(1, bits=4, power=0.5))
    ns: dict = {"print": lambda *a: None}
    worker = threading.Thread(target=exec, args=(code, ns), daemon=True)
    worker.start()
    seq = 1

    def step():
        nonlocal seq
        pub.handle_snapshot()
        if "arrays" in ns:  # snapshot decoded; keep updates coming until the second recv
            seq += 1
            pub.publish(make_map(seq, bits=2))
        worker.join(0.005)
    try:
        assert until(lambda: not worker.is_alive(), step=step)
        assert ns["topic"] == "map" and ns["fields"]["seq"] >= 2
        np.testing.assert_array_equal(ns["arrays"]["bits"], 2)
        assert ns["arrays"]["power_lin"].dtype == np.dtype("<f4")
    finally:
        for name in ("sub", "req"):
            if name in ns:
                ns[name].close(linger=0)


class TestSections:
    """Each section's keys are exactly its object's keyword arguments."""

    @pytest.mark.parametrize("section, cls, extra", [
        ("PublishSection", MapPublisher, {"context", "epoch"}),
        ("StatusSection", StatusPublisher, {"context", "curve", "linger_s"}),
    ])
    def test_keys_are_constructor_kwargs(self, section, cls, extra):
        import inspect

        from brimline.daemon.runtime import config
        fields = set(getattr(config, section).model_fields)
        params = set(inspect.signature(cls).parameters)
        assert fields == params - extra

    def test_built_from_sections(self, ctx):
        from brimline.daemon.runtime.config import PublishSection, StatusSection
        pub_s = PublishSection(map_endpoint=ANY_PORT, snapshot_endpoint=ANY_PORT,
                               ack_endpoint=None, linger_s=0.0)
        with MapPublisher(**pub_s.model_dump(), context=ctx) as p, \
                StatusPublisher(**StatusSection(endpoint=ANY_PORT).model_dump(),
                                curve=p.curve, context=ctx) as sp:
            assert p.ack_socket is None and sp.endpoint.startswith("tcp://127.0.0.1:")

    @pytest.mark.parametrize("data, match", [
        ({"map_endpoint": "localhost:7341"}, r"publish.map_endpoint='localhost:7341'"),
        ({"heartbeat_s": 0}, r"publish.heartbeat_s=0: heartbeat_s=0.0 must be a positive finite number"),
        ({"curve_clients_dir": "clients"}, "curve_clients_dir needs curve_secret_key"),
        ({"hearbeat_s": 1.0}, "unknown key publish.hearbeat_s"),
    ])
    def test_publish_errors_name_the_key(self, data, match):
        from brimline.daemon.errors import ConfigError
        from brimline.daemon.runtime.config import PublishSection, parse_section
        with pytest.raises(ConfigError, match=match):
            parse_section(PublishSection, data, where="demo.yaml", name="publish")

    @pytest.mark.parametrize("data, match", [
        ({"rate_hz": -1.0}, "rate_hz=-1.0 must be a positive finite number"),
        ({"hwm": 0}, "hwm=0 must be >= 1"),
    ])
    def test_status_errors_name_the_key(self, data, match):
        from brimline.daemon.errors import ConfigError
        from brimline.daemon.runtime.config import StatusSection, parse_section
        with pytest.raises(ConfigError, match=match):
            parse_section(StatusSection, data, where="demo.yaml", name="status")


class TestPlainFollowerInReadme:
    """The README's complete minimal follower (plain pyzmq and numpy) runs as written against a
    MapPublisher on loopback: the follower rules of "Following the maps", one by one."""

    @pytest.fixture
    def plain(self, pub, ctx):
        text = README.read_text()
        code = re.search(r"<!-- snippet: plain-follower -->\n```python\n(.*?)```", text,
                         re.S).group(1)
        ns: dict = {"__name__": "readme_follower"}
        exec(compile(code, "README.md:plain-follower", "exec"), ns)
        plan = wifi_like_plan()
        follower = ns["PlainFollower"](
            plan.plan_id, plan.data_tones, range(9), plan.data_tones.size * 1.0, 1.0,
            maps=pub.map_endpoint, snapshots=pub.snapshot_endpoint, acks=pub.ack_endpoint,
            heartbeat_s=0.05, ctx=ctx)
        yield follower
        follower.close()

    @staticmethod
    def pump(pub, follower, condition):
        def step():
            pub.handle_snapshot()
            pub.tick(time.monotonic())
            follower.poll(0.002)
        return until(condition, step=step)

    def test_snapshot_then_updates_in_order(self, pub, plain):
        pub.publish(make_map(1, bits=4, power=0.5))
        assert self.pump(pub, plain, lambda: plain.pending is not None)
        assert plain.pending[0]["seq"] == 1 and plain.req is None
        assert plain.map_for(5) is None  # map 1 applies from frame 10 on (effective_frame)
        fields, arrays = plain.map_for(10)
        assert fields["seq"] == 1 and (arrays["bits"] == 4).all()
        pub.publish(make_map(2, bits=3))
        assert self.pump(pub, plain, lambda: plain.seq == 2)
        assert plain.map_for(20)[0]["seq"] == 2
        acks = []
        assert until(lambda: acks.extend(pub.poll_acks()) or len(acks) == 2)
        assert [(a["seq"], a["frame"], a["epoch"]) for a in acks] == \
            [(1, 10, "e1"), (2, 20, "e1")]
        assert pub.counters["bad_acks"] == 0

    def test_lost_update_refused_map_and_new_epoch(self, pub, plain):
        pub.publish(make_map(1))
        assert self.pump(pub, plain, lambda: plain.seq == 1)
        plain.map_for(10)
        pub.publish(make_map(2, power=5.0))  # over the 1.0 cap: refused, its seq used up
        assert self.pump(pub, plain, lambda: plain.seq == 2)
        assert plain.pending is None and plain.map_for(99)[0]["seq"] == 1
        pub.prime(make_map(3))  # map 3 never reaches the follower as an update (lost) ...
        # ... but the heartbeat names seq 3, so the follower asks for the snapshot
        assert self.pump(pub, plain, lambda: plain.seq == 3 and plain.pending is not None)
        pub.publish(make_map(0, epoch="e2"))  # the daemon started afresh
        assert self.pump(pub, plain, lambda: plain.epoch == "e2" and plain.seq == 0)

    def test_silence_makes_it_stale(self, pub, plain):
        pub.publish(make_map(1))
        assert self.pump(pub, plain, lambda: plain.seq == 1)
        assert not plain.stale()
        assert until(lambda: plain.poll(0.01) or plain.stale())  # no heartbeats any more


class TestKeyFileHeader:
    def test_header_names_the_config_keys_not_a_home_folder(self, tmp_path, capsys):
        """The key files' comment header says where each half goes in brimline's own config
        (``publish.curve_secret_key``, ``publish.curve_clients_dir``) and the files still read
        with pyzmq's own certificate reader (the format ZeroMQ's authenticator loads)."""
        assert main(["keys", str(tmp_path / "k"), "--name", "site-b"]) == 0
        pub_text = (tmp_path / "k/site-b.key").read_text()
        sec_text = (tmp_path / "k/site-b.key_secret").read_text()
        assert "publish.curve_clients_dir" in pub_text and "--daemon-key site-b.key" in pub_text
        assert "publish.curve_secret_key: site-b.key_secret" in sec_text
        for text in (pub_text, sec_text):
            assert "home dir" not in text.lower() and "~" not in text and "/.curve" not in text
            assert "secret-key" not in text.split("curve\n")[0]  # header lines are comments
        assert "secret-key" not in pub_text
        pub, sec = zmq.auth.load_certificate(str(tmp_path / "k/site-b.key_secret"))
        assert zmq.curve_public(sec) == pub == load_keypair(tmp_path / "k/site-b.key").public
        assert zmq.auth.load_certificate(str(tmp_path / "k/site-b.key"))[1] is None
