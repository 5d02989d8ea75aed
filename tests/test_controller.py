"""The link controller (brimline.daemon.core.controller), driven with a fake clock.

Time is a plain float handed to every call, so each test states exactly when things happen; no
sockets, threads or sleeps. Estimates come from the scripted flat-channel source of the service
tests (tests/_service_fakes.py: invented data, seeded), iterated directly.
"""

from __future__ import annotations

import numpy as np
import pytest
from _service_fakes import ReloadEveryTime, ScriptedDriver, loopback_config

from brimline.daemon.core.controller import ON_TIME_ACKS, REJECTED, LinkController
from brimline.daemon.errors import StateError
from brimline.daemon.records import Estimate, LoadMap
from brimline.daemon.runtime.assemble import build_core
from brimline.daemon.wire import codec
from brimline.drivers.link.frame import make_plan

EPOCH = "00c0ffee00c0ffee"
STALE_S = 0.5
LEAD = 3


def _controller(*, reload_every_time: bool = False, **kw) -> LinkController:
    plan, loader, estimator, change = build_core(loopback_config())
    if reload_every_time:
        change = ReloadEveryTime(loader)
    kw.setdefault("next_seq", 5)
    return LinkController(plan, estimator, change, gap_db=loader.gap_db, epoch=EPOCH,
                          lead_frames=LEAD, stale_after_s=STALE_S, fallback_bits=2,
                          fallback_power_db=-1.0, **kw)


def _estimates(ctl: LinkController, **kw) -> list[Estimate]:
    return list(ScriptedDriver(ctl.plan, **kw).frames())


def _feed(ctl: LinkController, estimates) -> list:
    """Each estimate at its own time (the service's ``source`` clock)."""
    return [ctl.on_estimate(e, e.time_s) for e in estimates]


def _maps(steps) -> list[LoadMap]:
    return [m for s in steps for m in s.maps]


class TestFirstMapAndKeep:
    def test_first_estimate_makes_the_first_map(self):
        ctl = _controller()
        est = _estimates(ctl, frames=1, t0_s=2.0, frame0=40)[0]
        step = ctl.on_estimate(est, 2.0)
        assert step.kind == "reload" and len(step.maps) == 1
        m = step.maps[0]
        assert (m.epoch, m.seq, m.created_s, m.fallback) == (EPOCH, 5, 2.0, False)
        assert m.plan_id == ctl.plan.plan_id
        assert np.array_equal(m.tone_index, ctl.plan.data_tones)
        assert step.changes[0].seq == 5 and step.changes[0].kind == "reload"
        assert (step.changes[0].cause, step.changes[0].bits_before,
                step.changes[0].bits_after) == ("first_map", None, m.total_bits)
        assert ctl.current_map is m and ctl.current_kind == "reload"
        assert ctl.frames == {"received": 1, "accepted": 1, "decode_errors": 0,
                              "last_frame": 40}

    def test_a_steady_channel_keeps_the_map(self):
        ctl = _controller()
        steps = _feed(ctl, _estimates(ctl, frames=60, snr_db=25.0))
        assert steps[0].kind == "reload"
        keeps = [s for s in steps[1:] if s.kind == "keep"]
        assert len(keeps) >= 50  # a steady channel: change control holds the map
        assert all(not s.maps and not s.changes for s in keeps)
        assert ctl.accepted == 60 and not ctl.stale and not ctl.fallback_active


class TestStaleness:
    def test_silence_brings_the_fallback_map_on_tick_once(self):
        """The fallback map loads every tone with the configured bits at the configured power;
        -1 dB is 10**(-1/10) = 0.794 in linear power (definition of the decibel)."""
        ctl = _controller()
        _feed(ctl, _estimates(ctl, frames=10))  # last accepted at 0.09 s
        quiet = ctl.on_tick(0.09 + STALE_S - 0.01)
        assert quiet.maps == () and quiet.cause == "fresh"
        assert not ctl.stale
        step = ctl.on_tick(0.09 + STALE_S)
        assert step.kind == "fallback" and len(step.maps) == 1
        assert step.cause == "fallback" and step.changes[0].cause == "fallback"
        fb = step.maps[0]
        assert fb.fallback and np.all(fb.bits == 2)
        assert np.allclose(fb.power_lin, 0.794, atol=5e-4)
        assert fb.created_s == pytest.approx(0.09 + STALE_S)
        assert ctl.stale and ctl.fallback_active
        assert ctl.on_tick(5.0).maps == ()  # sent once, not again while silent
        assert ctl.maps_published["fallback"] == 1

    def test_silence_before_any_estimate_counts_from_start(self):
        ctl = _controller(start_s=10.0)
        assert ctl.on_tick(10.0 + STALE_S / 2).maps == ()
        step = ctl.on_tick(10.0 + STALE_S)
        assert step.kind == "fallback" and step.maps[0].seq == 5

    def test_fallback_then_recovery(self):
        ctl = _controller()
        _feed(ctl, _estimates(ctl, frames=10))
        assert ctl.on_tick(2.0).kind == "fallback"
        steps = _feed(ctl, _estimates(ctl, frames=5, t0_s=2.5, frame0=250))
        back = _maps(steps)
        assert back and not back[0].fallback  # the first decision after a fallback reloads
        change = [c for s in steps for c in s.changes][0]
        assert change.cause == "after_fallback"
        assert (change.bits_before, change.bits_after) == (2 * ctl.plan.data_tones.size,
                                                            back[0].total_bits)
        assert ctl.changes[-2].cause == "fallback"
        assert back[0].created_s == 2.5
        assert not ctl.fallback_active and not ctl.stale

    def test_a_gap_in_source_time_sends_the_fallback_first(self):
        ctl = _controller()
        steps = _feed(ctl, _estimates(ctl, frames=300, gaps=[(1.0, 2.0)]))
        after_gap = next(s for s in steps if s.now_s >= 2.0)
        assert [m.fallback for m in after_gap.maps] == [True, False]
        fb, normal = after_gap.maps
        # Dated when a live controller would have sent it: last accepted + stale_after_s.
        assert fb.created_s == pytest.approx(0.99 + STALE_S)
        assert normal.created_s == 2.0 and normal.seq == fb.seq + 1
        assert [c.kind for c in after_gap.changes] == ["fallback", "reload"]

    def test_time_never_goes_back_before_a_fallback(self):
        ctl = _controller()
        _feed(ctl, _estimates(ctl, frames=10))
        ctl.on_tick(3.0)  # a fallback on extrapolated time
        est = _estimates(ctl, frames=1, t0_s=1.0, frame0=100)[0]
        assert ctl.on_estimate(est, 1.0).now_s == 3.0


class TestRejections:
    def test_estimates_of_another_plan_are_rejected_and_counted(self):
        ctl = _controller()
        other = make_plan(fft_size=256, used_tones_half=90)
        steps = [ctl.on_estimate(e, e.time_s)
                 for e in ScriptedDriver(other, frames=4).frames()]
        assert {(s.kind, s.reason) for s in steps} == {(REJECTED, "other_plan")}
        assert _maps(steps) == [] and ctl.current_map is None
        assert ctl.rejected["other_plan"] == 4 and ctl.received == 4 and ctl.accepted == 0

    def test_same_plan_id_with_other_tones_is_rejected(self):
        ctl = _controller()
        good = _estimates(ctl, frames=1)[0]
        n = good.n_tones
        moved = Estimate(frame=0, time_s=0.0, plan_id=good.plan_id,
                         tone_index=np.asarray(good.tone_index)[::-1], channel=good.channel,
                         noise_var=good.noise_var, snr_db=good.snr_db)
        assert moved.n_tones == n
        step = ctl.on_estimate(moved, 0.0)
        assert (step.kind, step.reason) == (REJECTED, "other_plan")

    def test_estimator_rejections_are_counted_by_reason(self):
        ctl = _controller()
        steps = _feed(ctl, _estimates(ctl, frames=20, bad_every=5))
        assert ctl.rejected == {"non_finite": 4} and ctl.accepted == 16
        assert [s.reason for s in steps if s.kind == REJECTED] == ["non_finite"] * 4

    def test_undecodable_estimates_are_counted(self):
        ctl = _controller()
        ctl.count_undecodable()
        assert ctl.frames["decode_errors"] == 1 and ctl.received == 0


class TestSequenceAndFrames:
    def test_sequence_numbers_strictly_increase_through_fallbacks(self):
        ctl = _controller(reload_every_time=True)
        steps = _feed(ctl, _estimates(ctl, frames=200, gaps=[(0.5, 1.2), (1.4, 1.95)]))
        steps.append(ctl.on_tick(5.0))
        seqs = [m.seq for m in _maps(steps)]
        assert seqs == list(range(5, 5 + len(seqs)))  # strictly increasing, none skipped
        assert sum(m.fallback for m in _maps(steps)) == 3
        assert ctl.next_seq == seqs[-1] + 1

    def test_effective_frame_is_last_frame_plus_lead(self):
        ctl = _controller(reload_every_time=True)
        ests = _estimates(ctl, frames=20, frame0=1000)
        for e in ests:
            step = ctl.on_estimate(e, e.time_s)
            assert step.maps[-1].effective_frame == e.frame + LEAD
        # A later frame number seen on a rejected estimate counts as well.
        other = make_plan(fft_size=256, used_tones_half=90)
        ctl.on_estimate(next(iter(ScriptedDriver(other, frames=1, frame0=5000).frames())), 0.5)
        step = ctl.on_tick(10.0)
        assert step.maps[0].effective_frame == 5000 + LEAD

    def test_a_failed_reserve_holds_the_map_back_without_using_its_seq(self):
        refuse = {7}

        def reserve(seq):
            if seq in refuse:
                raise StateError(f"state.bin: cannot save state (seq {seq})")

        ctl = _controller(reload_every_time=True, reserve=reserve)
        ests = iter(_estimates(ctl, frames=10))
        first = [ctl.on_estimate(e, e.time_s) for e in (next(ests), next(ests))]
        assert [m.seq for m in _maps(first)] == [5, 6]
        e = next(ests)
        held = ctl.on_estimate(e, e.time_s)
        assert held.maps == () and "seq 7" in held.held_back
        assert ctl.held_back == 1 and ctl.state_unsaved and ctl.current_map.seq == 6
        refuse.clear()
        e = next(ests)
        resumed = ctl.on_estimate(e, e.time_s)
        assert resumed.maps[0].seq == 7 and not ctl.state_unsaved and resumed.held_back is None


class TestLeadFromAcks:
    """The lead shrinks only on the follower's evidence and grows back at once."""

    def _run(self, ctl, ests, late_by=0):
        """Feed each estimate; acknowledge each map at its effective frame (+ late_by)."""
        leads = []
        for e in ests:
            for m in ctl.on_estimate(e, e.time_s).maps:
                leads.append(m.effective_frame - e.frame)
                assert ctl.on_ack(m.seq, m.effective_frame + late_by)
        return leads

    def test_without_acks_the_configured_lead_holds(self):
        ctl = _controller(reload_every_time=True)
        _feed(ctl, _estimates(ctl, frames=30))
        assert ctl.lead_in_use == LEAD

    def test_on_time_acks_lower_the_lead_to_one(self):
        ctl = _controller(reload_every_time=True)
        leads = self._run(ctl, _estimates(ctl, frames=30))
        # one frame less after every ON_TIME_ACKS maps in force at their frame, down to 1
        assert leads[:ON_TIME_ACKS] == [LEAD] * ON_TIME_ACKS
        assert leads[ON_TIME_ACKS] == LEAD - 1
        assert leads[-1] == 1 and min(leads) == 1
        assert ctl.acks_late == 0

    def test_a_late_map_raises_the_lead_at_once_and_slows_the_next_probe(self):
        ctl = _controller(reload_every_time=True)
        ests = _estimates(ctl, frames=40, frame0=100)
        self._run(ctl, ests[:3 * ON_TIME_ACKS])
        assert ctl.lead_in_use == 1
        e = ests[3 * ON_TIME_ACKS]
        m = ctl.on_estimate(e, e.time_s).maps[0]
        assert ctl.on_ack(m.seq, m.effective_frame + 2)    # two frames late
        assert ctl.lead_in_use == 3 and ctl.acks_late == 1
        leads = self._run(ctl, ests[3 * ON_TIME_ACKS + 1:])
        # the next probe waits twice as many on-time maps
        assert leads[:2 * ON_TIME_ACKS] == [3] * (2 * ON_TIME_ACKS)
        assert leads[2 * ON_TIME_ACKS] == 2

    def test_never_above_the_configured_lead_and_unknown_acks_change_nothing(self):
        ctl = _controller(reload_every_time=True)
        ests = _estimates(ctl, frames=5)
        self._run(ctl, ests, late_by=50)
        assert ctl.lead_in_use == LEAD
        assert not ctl.on_ack(10_000, 3)
        assert not ctl.on_ack(-1, 3)

    def test_the_fallback_returns_to_the_configured_lead(self):
        ctl = _controller(reload_every_time=True)
        ests = _estimates(ctl, frames=3 * ON_TIME_ACKS)
        self._run(ctl, ests)
        assert ctl.lead_in_use == 1
        step = ctl.on_tick(ests[-1].time_s + STALE_S + 0.1)
        assert step.kind == "fallback" and ctl.lead_in_use == LEAD


class TestRestoreAndDeterminism:
    def test_restored_map_is_in_force_until_the_first_new_one(self):
        ctl = _controller()
        m = _maps(_feed(ctl, _estimates(ctl, frames=1)))[0]
        again = _controller(restored=m, next_seq=m.seq + 256)
        assert again.current_map is m and again.current_kind == "restored"
        new = _maps(_feed(again, _estimates(again, frames=1, t0_s=10.0)))
        assert new[0].seq == m.seq + 256

    def test_a_restored_map_of_another_plan_is_refused(self):
        other = make_plan(fft_size=256, used_tones_half=90)
        m = LoadMap(epoch=EPOCH, seq=0, effective_frame=0, created_s=0.0,
                    plan_id=other.plan_id, tone_index=other.data_tones,
                    bits=np.zeros(other.data_tones.size),
                    power_lin=np.zeros(other.data_tones.size), total_bits=0, margin_db=0.0,
                    gap_db=0.0)
        with pytest.raises(ValueError, match="restored map is for tone plan"):
            _controller(restored=m)

    def test_same_inputs_give_the_same_map_bytes(self):
        def run() -> list[bytes]:
            ctl = _controller()
            ests = _estimates(ctl, frames=400, fades=[(1.0, 20, 70, 14.0), (2.5, 100, 140, 8.0)],
                              gaps=[(3.0, 3.8)])
            steps = _feed(ctl, ests[:250]) + [ctl.on_tick(3.6)] + _feed(ctl, ests[250:])
            return [b"".join(bytes(f) for f in codec.encode(codec.TOPIC_MAP, m))
                    for m in _maps(steps)]

        a, b = run(), run()
        assert len(a) >= 4 and a == b
