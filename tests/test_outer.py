"""The outer margin loop (brimline.daemon.core.outer) and its place in the link controller.

The rule and its fixed point are those of outer-loop link adaptation (Nakamura, Awad and
Vadgama, WPMC 2002; Blanquez-Casado et al., EURASIP JWCN 2016:20; CHECKS.md "Outer-loop
adaptation"): up by Delta_up on each block error, down by Delta_down on each success, and the
error rate settles at T when Delta_down / Delta_up = T / (1 - T), which is 1/9 for T = 10 %.
The frame error process here is synthetic (invented for the test): Bernoulli frames whose error
probability falls by a factor of ten for every 3 dB of offset, seeded.
"""

import inspect
import math

import numpy as np
import pytest
import zmq
from protocol_helpers import ANY_PORT, until

from brimline.daemon.core.change import ChangeControl
from brimline.daemon.core.controller import LinkController
from brimline.daemon.core.estimator import Estimator
from brimline.daemon.core.loading import Loader
from brimline.daemon.core.outer import OUTER_LIMITS, OuterLoop, step_down_ratio
from brimline.daemon.errors import ConfigError
from brimline.daemon.net.publisher import MapPublisher
from brimline.daemon.records import Estimate, FrameOutcome, TonePlan
from brimline.daemon.runtime.assemble import build_controller, build_core
from brimline.daemon.runtime.config import OuterSection, load_config
from brimline.daemon.wire import codec


def error_probability(offset_db, fixed_point_db, target):
    """Synthetic: the error rate equals ``target`` at ``fixed_point_db`` and falls tenfold per
    3 dB of offset above it."""
    return min(1.0, target * 10.0 ** (-(offset_db - fixed_point_db) / 3.0))


def run_loop(loop, rng, fixed_point_db, frames, settle):
    errors = []
    for k in range(frames):
        p = error_probability(loop.offset_db(k * 0.01), fixed_point_db, loop.target_fer)
        errored = bool(rng.random() < p)
        loop.record(errored, k, k * 0.01)
        if k >= settle:
            errors.append(errored)
    return float(np.mean(errors))


class TestRule:
    def test_step_ratio_is_the_published_one(self):
        """T / (1 - T): 1/9 for T = 10 % (CHECKS.md, outer-loop adaptation; computed)."""
        assert step_down_ratio(0.1) == pytest.approx(1.0 / 9.0, rel=1e-12)
        loop = OuterLoop(target_fer=0.1, step_up_db=0.9)
        assert loop.step_down_db / loop.step_up_db == pytest.approx(1.0 / 9.0, rel=1e-12)
        assert step_down_ratio(0.01) == pytest.approx(1.0 / 99.0, rel=1e-12)

    def test_one_error_and_nine_successes_cancel(self):
        """At T = 10 % one error and nine good frames leave the offset where it was."""
        loop = OuterLoop(target_fer=0.1, step_up_db=0.5)
        loop.record(True, 0, 0.0)
        for k in range(1, 10):
            loop.record(False, k, 0.0)
        assert loop.offset_db(0.0) == pytest.approx(0.0, abs=1e-12)
        assert loop.measured_fer() == pytest.approx(0.1)

    @pytest.mark.parametrize("fixed_point_db", [2.0, -2.0])
    def test_error_rate_settles_at_the_target_from_both_sides(self, rng, fixed_point_db):
        """From above (the gap too optimistic: errors at 0 dB far above T) and from below
        (too pessimistic), the measured frame error rate settles within 15 % of T = 10 %, and
        the offset ends near the synthetic fixed point."""
        loop = OuterLoop(target_fer=0.1, step_up_db=0.3, min_offset_db=-6.0,
                         max_offset_db=6.0, quiet_s=1.0)
        start_p = error_probability(0.0, fixed_point_db, 0.1)
        assert (start_p > 0.1) == (fixed_point_db > 0)
        fer = run_loop(loop, rng, fixed_point_db, 30000, 3000)
        assert abs(fer - 0.1) <= 0.015
        assert abs(loop.offset_db(300.0) - fixed_point_db) < 1.5

    def test_offset_stays_within_its_bounds(self):
        loop = OuterLoop(target_fer=0.1, step_up_db=1.0, min_offset_db=-1.0, max_offset_db=2.0)
        for k in range(10):
            loop.record(True, k, 0.0)
        assert loop.offset_db(0.0) == 2.0
        for k in range(10, 1000):
            loop.record(False, k, 0.0)
        assert loop.offset_db(0.0) == -1.0

    def test_off_without_feedback(self):
        """No outcome yet: 0 dB; after quiet_s without one the offset is 0 dB again (and
        stays there) and the window is cleared."""
        loop = OuterLoop(target_fer=0.1, step_up_db=1.0, quiet_s=2.0)
        assert loop.offset_db(100.0) == 0.0 and not loop.active(100.0)
        for k in range(3):
            loop.record(True, k, 0.0)
        assert loop.offset_db(1.9) == 3.0 and loop.active(1.9)
        assert loop.offset_db(2.0) == 0.0 and not loop.active(2.0)
        assert math.isnan(loop.measured_fer())
        assert loop.counters["went_off"] == 1
        assert loop.record(True, 0, 10.0)          # numbering starts afresh
        assert loop.offset_db(10.0) == 1.0

    def test_repeated_frames_are_dropped(self):
        loop = OuterLoop()
        assert loop.record(True, 5, 0.0)
        assert not loop.record(True, 5, 0.0)
        assert not loop.record(False, 4, 0.0)
        assert loop.counters["repeated"] == 2 and loop.counters["outcomes"] == 1

    @pytest.mark.parametrize("kwargs, match", [
        ({"target_fer": 1.0}, r"outer.target_fer=1.0 must be in \(0, 1\)"),
        ({"target_fer": 0.0}, r"outer.target_fer=0.0"),
        ({"step_up_db": float("nan")}, r"outer.step_up_db=nan must be a positive"),
        ({"min_offset_db": 1.0}, r"outer.min_offset_db=1.0 must be <= 0"),
        ({"max_offset_db": -1.0}, r"outer.max_offset_db=-1.0 must be >= 0"),
        ({"window_frames": 0}, r"outer.window_frames=0 must be >= 1"),
    ])
    def test_bad_settings_name_the_key(self, kwargs, match):
        with pytest.raises(ValueError, match=match):
            OuterLoop(**kwargs)

    def test_limits_cover_every_keyword(self):
        assert set(OUTER_LIMITS) == set(inspect.signature(OuterLoop).parameters)


# ----------------------------------------------------------------------------- controller

N = 24


def controller(outer):
    plan = TonePlan(fft_size=64, cp_len=16, data_tones=np.arange(1, N + 1), pilot_tones=[],
                    null_tones=[], sample_rate_hz=1e6)
    loader = Loader(gap_db=12.8)
    return plan, LinkController(plan, Estimator(), ChangeControl(loader), gap_db=12.8,
                                epoch="e1", outer=outer)


def estimate(plan, k, snr_db=25.0):
    return Estimate(frame=k, time_s=k * 0.01, plan_id=plan.plan_id,
                    tone_index=plan.data_tones, channel=np.ones(N), noise_var=np.ones(N),
                    snr_db=np.full(N, snr_db))


class TestController:
    def test_offset_step_is_one_decision_and_carried_in_the_map(self):
        """Errors raise the offset: the band's effective SNR falls by it at once, which is
        one reload (common mode), and that map's gap_db is the gap plus the offset."""
        plan, ctl = controller(OuterLoop(target_fer=0.1, step_up_db=1.0, quiet_s=10.0))
        for k in range(300):
            ctl.on_estimate(estimate(plan, k), k * 0.01)
        before = ctl.current_map
        for j in range(3):
            assert ctl.on_outcome(FrameOutcome("e1", before.seq, 1000 + j, True, 3.0), 3.0)
        maps = []
        for k in range(300, 400):
            maps += ctl.on_estimate(estimate(plan, k), k * 0.01).maps
        assert len(maps) == 1, [m.reason for m in maps]
        assert maps[0].gap_db == pytest.approx(12.8 + 3.0)
        assert maps[0].total_bits < before.total_bits
        status = ctl.outer_status(4.0)
        assert status["offset_db"] == 3.0 and status["outcomes"] == 3 and status["active"]

    def test_offset_fall_reloads_at_once(self):
        """Good frames lower the offset; once it is common_drop_db below the map's, one reload
        follows at once (no upgrade dwell), with more bits."""
        plan, ctl = controller(OuterLoop(target_fer=0.1, step_up_db=1.0, quiet_s=100.0))
        for j in range(3):
            ctl.on_outcome(FrameOutcome("e1", 0, j, True, 0.0), 0.0)
        for k in range(300):
            ctl.on_estimate(estimate(plan, k), k * 0.01)
        before = ctl.current_map
        assert before.gap_db == pytest.approx(15.8)
        for j in range(3, 3 + 12):   # 12 good frames: -12/9 dB
            ctl.on_outcome(FrameOutcome("e1", before.seq, j, False, 3.0), 3.0)
        step = ctl.on_estimate(estimate(plan, 300), 3.0)
        assert len(step.maps) == 1 and "outer loop offset" in step.reason
        assert step.maps[0].total_bits > before.total_bits
        assert step.maps[0].gap_db == pytest.approx(15.8 - 12 / 9)

    def test_foreign_and_repeated_outcomes_are_counted_and_dropped(self):
        plan, ctl = controller(OuterLoop())
        assert not ctl.on_outcome(FrameOutcome("other", 0, 1, True, 0.0), 0.0)
        assert ctl.on_outcome(FrameOutcome("e1", 0, 1, True, 0.0), 0.0)
        assert not ctl.on_outcome(FrameOutcome("e1", 0, 1, True, 0.0), 0.0)
        ctl.count_bad_outcome()
        assert ctl.outer_status(0.0)["dropped"] == {"other_epoch": 1, "repeated": 1,
                                                    "undecodable": 1}

    def test_without_an_outer_loop_outcomes_are_dropped(self):
        plan, ctl = controller(None)
        assert not ctl.on_outcome(FrameOutcome("e1", 0, 1, True, 0.0), 0.0)
        assert ctl.outcomes_dropped["no_outer_loop"] == 1
        assert ctl.outer_status(0.0) is None


@pytest.mark.parametrize("fields, match", [
    (dict(seq=-1), "seq=-1 must be >= 0"),
    (dict(frame=1.5), "frame=1.5 must be an integer"),
    (dict(errored="yes"), "errored='yes' must be true or false"),
    (dict(time_s=float("inf")), "time_s=inf must be finite"),
])
def test_frame_outcome_record_checks_its_fields(fields, match):
    good = dict(epoch="e", seq=0, frame=0, errored=False, time_s=0.0)
    with pytest.raises(ValueError, match=match):
        FrameOutcome(**{**good, **fields})


# ----------------------------------------------------------------------------- the socket

class TestOutcomeSocket:
    """The daemon's outcome PULL: good outcomes come through, anything else is counted and
    dropped (the codec's ProtocolError path), never raised."""

    def test_good_and_hostile_messages(self, ctx):
        with MapPublisher(map_endpoint=ANY_PORT, snapshot_endpoint=ANY_PORT,
                          ack_endpoint=None, outcome_endpoint=ANY_PORT, context=ctx,
                          linger_s=0.0) as pub:
            push = ctx.socket(zmq.PUSH)
            push.setsockopt(zmq.LINGER, 0)
            push.connect(pub.outcome_endpoint)
            good = FrameOutcome("e1", 3, 17, True, 1.5)
            hostile = [
                [b"outcome"],                                        # no header
                [b"outcome", b"{not json"],                          # bad JSON
                codec.encode("ack", {"epoch": "e1", "seq": 1, "frame": 2, "time_s": 0.0}),
                codec.encode(codec.TOPIC_OUTCOME, {"seq": 1}),       # a dict, not the record
                [b"outcome", b'{"v": 1, "type": "frame_outcome", "fields": {"epoch": "e", '
                             b'"seq": -4, "frame": 1, "errored": false, "time_s": 0.0}, '
                             b'"arrays": [], "crc32": 0}'],          # negative seq
                [b"outcome", b"x" * (128 * 1024)],                   # over the size limit
            ]
            for frames in hostile:
                push.send_multipart(frames)
            push.send_multipart(codec.encode(codec.TOPIC_OUTCOME, good))
            got = []
            assert until(lambda: got.extend(pub.poll_outcomes()) or got, timeout_s=10.0)
            assert got == [good]
            assert until(lambda: pub.poll_outcomes() == [] and
                         pub.counters["bad_outcomes"] == len(hostile) - 1, timeout_s=10.0)
            push.close()


class TestConfig:
    def test_section_keys_are_the_constructor_kwargs(self):
        defaults = {k: p.default for k, p in inspect.signature(OuterLoop).parameters.items()}
        assert OuterSection().model_dump() == defaults

    def test_yaml_errors_name_the_key(self, tmp_path):
        path = tmp_path / "c.yaml"
        path.write_text("outer:\n  step_up_db: 0.2\n  target_fer: 1.5\n")
        with pytest.raises(ConfigError, match=r"line 3: outer.target_fer=1.5"):
            load_config(path)

    def test_outer_section_makes_the_controllers_loop(self, tmp_path):
        path = tmp_path / "c.yaml"
        path.write_text("outer:\n  target_fer: 0.05\n")
        config = load_config(path)
        parts = build_core(config)
        ctl = build_controller(config, *parts, epoch="e")
        assert ctl.outer.target_fer == 0.05
        path.write_text("change:\n  up_dwell_s: 2.0\n")
        config = load_config(path)
        assert build_controller(config, *build_core(config), epoch="e").outer is None
