"""Follower: map checks, snapshot hand-over, gaps, epochs, staleness (real sockets, 127.0.0.1)."""

import math

import numpy as np
import pytest
import zmq
from hypothesis import given, settings
from hypothesis import strategies as st
from protocol_helpers import ANY_PORT, FakeClock, make_map, until, wifi_like_plan

from brimline.daemon.net.follower import Follower, check_map
from brimline.daemon.net.publisher import MapPublisher
from brimline.daemon.wire import codec

PLAN = wifi_like_plan()


@pytest.fixture
def pub(ctx):
    with MapPublisher(map_endpoint=ANY_PORT, snapshot_endpoint=ANY_PORT, ack_endpoint=None,
                      heartbeat_s=0.05, linger_s=0.0, context=ctx, epoch="e1") as p:
        yield p


def _follower(pub, ctx, **kw):
    kw.setdefault("bits", range(0, 9))
    return Follower(plan=PLAN, map_endpoint=pub.map_endpoint,
                    snapshot_endpoint=pub.snapshot_endpoint, context=ctx, **kw)


def _sync(pub, f, seq):
    assert until(lambda: f.current is not None and f.current.seq == seq and f.synced,
                 step=lambda: (pub.handle_snapshot(), f.poll(0.005)))


def _subscribed(pub, f):
    """Wait until the follower's SUB receives what the publisher sends (heartbeats)."""
    n = f.counters["heartbeats"]
    assert until(lambda: f.counters["heartbeats"] > n,
                 step=lambda: (pub.heartbeat(0.0), pub.handle_snapshot(), f.poll(0.005)))


class TestCheckMap:
    KW = dict(plan_id=PLAN.plan_id, tone_index=PLAN.data_tones, bits=range(0, 9),
              budget_lin=48.0, cap_lin=2.0)

    def test_good_map(self):
        assert check_map(make_map(1), **self.KW) is None

    def _bad(self, **fields):
        m = make_map(1)
        bits = np.array(fields.pop("bits", m.bits))
        power = np.array(fields.pop("power_lin", m.power_lin))
        fields.setdefault("total_bits", int(bits.sum()))
        return make_map(1, **{"bits": bits, "power_lin": power, **fields})

    @pytest.mark.parametrize("fields, reason", [
        (dict(plan_id="other"), "plan_id"),
        (dict(tone_index=PLAN.data_tones[::-1]), "tone_index"),
        (dict(bits=np.r_[9, np.full(47, 2)]), "bits"),
        (dict(total_bits=97), "total_bits"),
        (dict(power_lin=np.r_[np.inf, np.full(47, 0.9)]), "power_not_finite"),
        (dict(power_lin=np.r_[-0.1, np.full(47, 0.9)]), "power_negative"),
        (dict(bits=np.r_[0, np.full(47, 2)]), "power_on_unloaded_tone"),
        (dict(power_lin=np.r_[0.0, np.full(47, 0.9)]), "no_power_on_loaded_tone"),
        (dict(power_lin=np.full(48, 1.01)), "over_budget"),
        (dict(power_lin=np.r_[2.01, np.full(47, 0.9)]), "over_cap"),
    ])
    def test_each_reason(self, fields, reason):
        assert check_map(self._bad(**fields), **self.KW) == reason

    def test_tolerance_admits_float32_rounding(self):
        """A map at the budget whose float32 rounding lands just above it passes (0.1 % slack,
        common practice); 0.11 % over does not."""
        m = make_map(1, power=1.0 + 3e-7)
        assert m.power_lin.astype(np.float64).sum() > 48.0
        assert check_map(m, **self.KW) is None
        assert check_map(make_map(1, power=1.0011), **self.KW) == "over_budget"


class TestFollowing:
    def test_snapshot_then_updates(self, pub, ctx):
        pub.publish(make_map(1))
        seen = []
        with _follower(pub, ctx, on_map=seen.append) as f:
            _sync(pub, f, 1)
            _subscribed(pub, f)
            for seq in (2, 3):
                pub.publish(make_map(seq))
            assert until(lambda: f.current.seq == 3, step=lambda: f.poll(0.005))
        assert [m.seq for m in seen] == [1, 2, 3]
        assert f.counters["gaps"] == 0

    def test_invalid_map_is_rejected_and_the_last_good_kept(self, pub, ctx):
        pub.publish(make_map(1))
        with _follower(pub, ctx) as f:
            _sync(pub, f, 1)
            _subscribed(pub, f)
            pub.publish(make_map(2, power=1.5))  # 48 x 1.5 > 48: over the 0 dB budget
            assert until(lambda: f.counters["rejected"] == 1, step=lambda: f.poll(0.005))
            assert f.current.seq == 1
            assert f.last_rejection == "over_budget"
            assert f.counters["rejected:over_budget"] == 1
            pub.publish(make_map(3))
            assert until(lambda: f.current.seq == 3, step=lambda: f.poll(0.005))

    def test_map_for_another_plan_is_rejected(self, pub, ctx):
        pub.publish(make_map(1, plan_id="0123456789ab"))
        with _follower(pub, ctx) as f:
            assert until(lambda: f.counters["rejected:plan_id"] == 1,
                         step=lambda: (pub.handle_snapshot(), f.poll(0.005)))
            assert f.current is None

    def test_gap_is_detected_and_recovered_by_snapshot(self, pub, ctx):
        pub.publish(make_map(1))
        with _follower(pub, ctx) as f:
            _sync(pub, f, 1)
            _subscribed(pub, f)
            pub.prime(make_map(2))  # seq 2 never goes out on the map socket: "lost"
            pub.publish(make_map(3))
            requests = f.counters["snapshot_requests"]
            assert until(lambda: f.counters["gaps"] == 1, step=lambda: f.poll(0.005))
            assert f.counters["snapshot_requests"] == requests + 1
            _sync(pub, f, 3)
            assert f.counters["snapshots"] == 2

    def test_heartbeat_ahead_of_the_map_held_triggers_a_snapshot(self, pub, ctx):
        pub.publish(make_map(1))
        with _follower(pub, ctx) as f:
            _sync(pub, f, 1)
            pub.prime(make_map(2))  # the last update was lost; only heartbeats tell
            assert until(lambda: f.current.seq == 2,
                         step=lambda: (pub.heartbeat(0.0), pub.handle_snapshot(),
                                       f.poll(0.005)))
            assert f.counters["behind"] >= 1

    def test_new_epoch_resets_the_order(self, pub, ctx):
        pub.publish(make_map(7))
        with _follower(pub, ctx) as f:
            _sync(pub, f, 7)
            _subscribed(pub, f)
            pub.publish(make_map(0, epoch="e2"))  # daemon started afresh
            assert until(lambda: f.current.epoch == "e2", step=lambda: f.poll(0.005))
            assert f.current.seq == 0 and f.counters["epoch_changes"] == 1

    def test_no_map_yet_then_first_map(self, pub, ctx):
        with _follower(pub, ctx) as f:
            assert until(lambda: f.synced, step=lambda: (pub.handle_snapshot(), f.poll(0.005)))
            assert f.current is None
            _subscribed(pub, f)
            pub.publish(make_map(0))
            assert until(lambda: f.current is not None, step=lambda: f.poll(0.005))

    def test_snapshot_is_resent_after_its_timeout(self, pub, ctx):
        clock = FakeClock()
        with _follower(pub, ctx, clock=clock, snapshot_timeout_s=0.5) as f:
            f.poll(0.0)
            assert f.counters["snapshot_requests"] == 1
            clock.t += 0.6
            f.poll(0.0)
            assert f.counters["snapshot_requests"] == 2


class TestHandOver:
    """Updates that race the snapshot, against a scripted daemon built from the documented wire
    format (XPUB shows when the subscription has arrived)."""

    def test_updates_older_than_the_snapshot_are_dropped(self, ctx):
        xpub = ctx.socket(zmq.XPUB)
        router = ctx.socket(zmq.ROUTER)
        for s in (xpub, router):
            s.setsockopt(zmq.LINGER, 0)
        xpub.bind("tcp://127.0.0.1:*")
        router.bind("tcp://127.0.0.1:*")
        f = Follower(plan=PLAN, map_endpoint=xpub.getsockopt(zmq.LAST_ENDPOINT).decode(),
                     snapshot_endpoint=router.getsockopt(zmq.LAST_ENDPOINT).decode(),
                     context=ctx)
        try:
            subs = set()
            assert until(lambda: {b"\x01map", b"\x01heartbeat"} <= subs,
                         step=lambda: xpub.poll(5) and subs.add(xpub.recv()))
            assert router.poll(10_000)
            request = router.recv_multipart()
            assert request[1:] == [b"", b"snapshot"]
            for seq in (1, 2, 3):
                xpub.send_multipart(codec.encode("map", make_map(seq)))
            assert until(lambda: f.held_updates == 3, step=lambda: f.poll(0.005))
            assert f.current is None  # held until the snapshot says where we are
            router.send_multipart(request[:2] + codec.encode("snapshot", make_map(2)))
            assert until(lambda: f.current is not None and f.current.seq == 3,
                         step=lambda: f.poll(0.005))
            assert f.counters["old_dropped"] == 2 and f.counters["maps"] == 2
            assert f.held_updates == 0
            xpub.send_multipart([b"map", b"not json"])
            assert until(lambda: f.counters["malformed"] == 1, step=lambda: f.poll(0.005))
            assert f.current.seq == 3
        finally:
            f.close()


class TestStaleness:
    def test_dead_publisher_is_detected_by_missing_heartbeats(self, ctx):
        clock = FakeClock()
        pub = MapPublisher(map_endpoint=ANY_PORT, snapshot_endpoint=ANY_PORT,
                           ack_endpoint=None, heartbeat_s=0.05, linger_s=0, context=ctx)
        pub.publish(make_map(1))
        f = _follower(pub, ctx, clock=clock, heartbeat_timeout_s=0.2)
        try:
            _sync(pub, f, 1)
            for _ in range(5):  # heartbeats keep it fresh while time passes
                clock.t += 0.1
                n = f.counters["heartbeats"]
                assert until(lambda: f.counters["heartbeats"] > n,
                             step=lambda: (pub.heartbeat(clock.t), f.poll(0.005)))
                assert not f.stale()
            pub.close()  # the daemon dies
            f.poll(0.02)
            clock.t += 0.15
            assert not f.stale()
            clock.t += 0.1
            assert f.stale() and f.stale(clock.t) and not f.stale(clock.t - 0.2)
            assert f.current.seq == 1  # the last good map is still there for the transmitter
        finally:
            f.close()
            pub.close()


class TestLifecycle:
    def test_close_idempotent_then_poll_fails(self, pub, ctx):
        f = _follower(pub, ctx)
        f.close()
        f.close()
        with pytest.raises(RuntimeError, match="closed"):
            f.poll(0)

    def test_curve_keys_come_in_pairs(self, pub, ctx):
        with pytest.raises(ValueError, match="both curve_server_key and curve_client_key"):
            _follower(pub, ctx, curve_server_key="x.key")

    @pytest.mark.parametrize("kw, match", [
        (dict(heartbeat_timeout_s=0), "heartbeat_timeout_s=0"),
        (dict(snapshot_timeout_s=math.nan), "snapshot_timeout_s=nan"),
    ])
    def test_bad_timeouts(self, pub, ctx, kw, match):
        with pytest.raises(ValueError, match=match):
            _follower(pub, ctx, **kw)


def test_for_daemon_takes_endpoints_and_limits_from_the_sections(pub, ctx):
    from brimline.daemon.runtime.config import LoadingSection, PublishSection
    publish = PublishSection(map_endpoint=pub.map_endpoint.replace("127.0.0.1", "*"),
                             snapshot_endpoint=pub.snapshot_endpoint, ack_endpoint=None,
                             heartbeat_s=0.25)
    loading = LoadingSection(bits=[0, 2, 4], budget_db=-3.0)
    pub.publish(make_map(1, bits=2, power=0.45))  # 48 x 0.45 = 21.6 < 48 x 10^-0.3 = 24.06
    with Follower.for_daemon(publish, loading, plan=PLAN, context=ctx) as f:
        assert f.heartbeat_timeout_s == 1.0
        _sync(pub, f, 1)
        _subscribed(pub, f)
        pub.publish(make_map(2, bits=2, power=0.55))  # 26.4 > 24.06: over the -3 dB budget
        pub.publish(make_map(3, bits=6, power=0.3))  # 6 bits not in the allowed set
        assert until(lambda: f.counters["rejected"] == 2, step=lambda: f.poll(0.005))
        assert f.counters["rejected:over_budget"] == 1 and f.counters["rejected:bits"] == 1
        assert f.current.seq == 1


def test_first_map_after_an_unnamed_epoch_is_not_an_epoch_change(ctx):
    with MapPublisher(map_endpoint=ANY_PORT, snapshot_endpoint=ANY_PORT, ack_endpoint=None,
                      linger_s=0.0, context=ctx) as pub:  # no epoch given: heartbeats say ""
        with _follower(pub, ctx) as f:
            assert until(lambda: f.synced, step=lambda: (pub.handle_snapshot(), f.poll(0.005)))
            _subscribed(pub, f)
            pub.publish(make_map(0, epoch="e9"))
            assert until(lambda: f.current is not None, step=lambda: f.poll(0.005))
            assert f.counters["epoch_changes"] == 0


@pytest.fixture(scope="module")
def daemon():
    """A scripted daemon (XPUB + ROUTER) shared by the property examples."""
    context = zmq.Context()
    xpub, router = context.socket(zmq.XPUB), context.socket(zmq.ROUTER)
    for s in (xpub, router):
        s.setsockopt(zmq.LINGER, 0)
        s.bind("tcp://127.0.0.1:*")
    yield context, xpub, router
    context.destroy(linger=0)


class TestOrderProperty:
    """Whatever order, repeats, gaps, epochs and bad maps a daemon sends, the maps a follower
    hands on are all valid and, within an epoch, strictly increasing in seq."""

    @settings(max_examples=25, deadline=None)
    @given(events=st.lists(st.tuples(st.sampled_from(["a", "b"]), st.integers(0, 12),
                                     st.booleans()), min_size=1, max_size=25))
    def test_adopted_maps_are_valid_and_ordered(self, daemon, events):
        context, xpub, router = daemon
        adopted = []
        f = Follower(plan=PLAN, context=context, on_map=adopted.append,
                     map_endpoint=xpub.getsockopt(zmq.LAST_ENDPOINT).decode(),
                     snapshot_endpoint=router.getsockopt(zmq.LAST_ENDPOINT).decode())
        current = [None]

        def serve():
            while router.poll(0):
                req = router.recv_multipart()
                body = current[0] if current[0] is not None else {"epoch": "", "seq": -1}
                router.send_multipart(req[:2] + codec.encode("snapshot", body))
            while xpub.poll(0):
                xpub.recv()
            f.poll(0.002)
        try:
            assert until(lambda: f.synced, step=serve)
            while f.counters["heartbeats"] == 0:  # subscription in place
                xpub.send_multipart(codec.encode("heartbeat", {"epoch": "", "seq": -1}))
                serve()
            for epoch, seq, ok in events:
                m = make_map(seq, epoch=epoch, power=0.9 if ok else 1.5)
                current[0] = m
                xpub.send_multipart(codec.encode("map", m))
                serve()
            n = f.counters["heartbeats"]
            xpub.send_multipart(codec.encode("heartbeat", {"epoch": "", "seq": -1}))
            assert until(lambda: f.counters["heartbeats"] > n and f.synced, step=serve)
        finally:
            f.close()
        for m in adopted:
            assert check_map(m, plan_id=PLAN.plan_id, tone_index=PLAN.data_tones,
                             bits=range(9), budget_lin=48.0, cap_lin=np.inf) is None
        for a, b in zip(adopted, adopted[1:]):
            assert a.epoch != b.epoch or b.seq > a.seq
