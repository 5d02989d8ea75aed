"""Offline runs (brimline.daemon.runtime.offline): determinism, windows, the live margin, what-if.

The recording used is the shipped demo (replay/kestrel_lowmarsh_estimates.brlog, made by
replay/make_estimate_log.py: invented Kestrel Ridge -> Lowmarsh link, estimates of 16.0 s to
17.5 s left out) with config/replay.yaml.
"""

from __future__ import annotations

import json
import math
import pickle
from pathlib import Path

import numpy as np
import pytest

from brimline.daemon.errors import ConfigError, InputError, SourceError
from brimline.daemon.runtime import offline
from brimline.daemon.runtime.assemble import build_controller, build_core
from brimline.daemon.runtime.config import load_config
from brimline.daemon.runtime.offline import (
    MapEvent,
    OfflineResult,
    Timeline,
    Window,
    compare_results,
    replay_offline,
    result_lines,
    result_tables,
    source_epoch,
)
from brimline.daemon.wire import codec
from brimline.daemon.wire.export import json_safe
from brimline.daemon.wire.recording import read_recording

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "replay" / "kestrel_lowmarsh_estimates.brlog"
CONFIG = ROOT / "config" / "replay.yaml"
GAP_S = (16.0, 17.5)  # the hole make_estimate_log.py leaves in the recording


@pytest.fixture(scope="module")
def demo_run() -> OfflineResult:
    return replay_offline(CONFIG, DEMO, keep_snr=True)


class TestReplayOffline:
    def test_same_recording_same_settings_same_bytes(self, demo_run):
        again = replay_offline(load_config(CONFIG), DEMO)
        first = [bytes(b) for m in demo_run.maps for b in codec.encode(codec.TOPIC_MAP, m)]
        second = [bytes(b) for m in again.maps for b in codec.encode(codec.TOPIC_MAP, m)]
        assert first and first == second
        lines = [json.dumps(json_safe(x)) for x in result_lines(demo_run)]
        assert lines == [json.dumps(json_safe(x)) for x in result_lines(again)]

    def test_every_estimate_is_replayed_in_order(self, demo_run):
        recorded = [r for _t, r in read_recording(DEMO, topics=[codec.TOPIC_ESTIMATE])]
        tl = demo_run.timeline
        assert len(tl) == len(recorded) == demo_run.summary.frames
        assert np.array_equal(tl.frame, [e.frame for e in recorded])
        assert np.array_equal(demo_run.snr_db[17], recorded[17].snr_db)

    def test_maps_carry_the_recordings_epoch_and_rising_seqs(self, demo_run):
        assert {m.epoch for m in demo_run.maps} == {source_epoch(DEMO)}
        seqs = [m.seq for m in demo_run.maps]
        assert seqs == list(range(len(seqs)))
        assert [e.seq for e in demo_run.events] == seqs

    def test_the_hole_in_the_recording_gives_the_fallback_map(self, demo_run):
        fallback = [e for e in demo_run.events if e.kind == "fallback"]
        assert len(fallback) == 1
        # Dated when a live daemon would have sent it: last estimate before the hole plus
        # fallback.stale_after_s (1 s in config/replay.yaml).
        before = demo_run.timeline.time_s[demo_run.timeline.time_s < GAP_S[0]][-1]
        assert fallback[0].time_s == pytest.approx(before + 1.0)
        assert demo_run.summary.maps_by_kind["fallback"] == 1

    def test_summary_counts_add_up(self, demo_run):
        s = demo_run.summary
        assert s.maps == len(demo_run.maps) == sum(s.maps_by_kind.values())
        assert s.accepted + sum(s.rejected.values()) == s.frames
        assert s.changes_per_min == pytest.approx(s.maps / (s.duration_s / 60))
        assert s.rate_min_bits <= s.rate_mean_bits <= s.rate_max_bits
        assert s.rate_mean_bps == pytest.approx(s.rate_mean_bits * demo_run.symbol_rate_hz)
        assert 0.0 <= s.time_below_target_s <= s.duration_s + 0.1
        assert s.goodput_bps is None  # the recording has no payload error counts

    def test_window_by_time_and_frame(self):
        r = replay_offline(CONFIG, DEMO, window=Window(start_s=2.0, stop_s=3.0))
        assert r.timeline.time_s.min() >= 2.0 and r.timeline.time_s.max() < 3.0
        r = replay_offline(CONFIG, DEMO, window=Window(first_frame=10, last_frame=29))
        assert r.timeline.frame.tolist() == list(range(10, 30))

    def test_bad_window_is_an_input_error(self):
        with pytest.raises(InputError, match="stop_s=1.0 must be after start_s=2.0"):
            Window(start_s=2.0, stop_s=1.0)

    def test_overrides_reach_the_controller(self):
        r = replay_offline(CONFIG, DEMO, overrides={"fallback.bits": 3},
                           window=Window(start_s=15.0, stop_s=18.0))
        fb = [m for m in r.maps if m.fallback]
        assert fb and set(fb[0].bits.tolist()) == {3}
        assert r.settings == ("fallback.bits=3",)

    def test_bad_override_names_the_key_and_value(self):
        with pytest.raises(ConfigError, match=r"--set estimator.tau_s=-1.*tau_s=-1"):
            replay_offline(CONFIG, DEMO, overrides=["estimator.tau_s=-1"])

    def test_missing_recording_is_a_source_error(self, tmp_path):
        with pytest.raises(SourceError, match="no such recording"):
            replay_offline(None, tmp_path / "nope.brlog")

    def test_progress_is_reported(self):
        seen = []
        replay_offline(CONFIG, DEMO, window=Window(stop_s=0.5),
                       on_progress=lambda done, total: seen.append((done, total)))
        assert seen[0][0] == 1 and seen[0][1] == 925
        assert [d for d, _t in seen] == list(range(1, len(seen) + 1))

    def test_paced_replay_waits_by_recorded_time(self):
        now = [0.0]
        waits = []

        def sleep(s):
            waits.append(s)
            now[0] += s

        replay_offline(CONFIG, DEMO, window=Window(stop_s=0.2), speed=2.0, sleep=sleep,
                       clock=lambda: now[0])
        # 10 frames 20 ms apart (0 to 0.18 s) at twice the speed: 90 ms of waiting.
        assert len(waits) == 9 and sum(waits) == pytest.approx(0.18 / 2.0)

    def test_decision_and_map_lines_carry_the_controllers_cause(self, demo_run):
        """The JSON Lines name the rule behind each decision and map as the daemon's logs do:
        the same controller, fed the recording's estimates directly, gives the same causes."""
        cfg = load_config(CONFIG)
        plan, loader, estimator, change = build_core(cfg)
        controller = build_controller(cfg, plan, loader, estimator, change, epoch="direct")
        step_causes, map_causes = [], []
        for _t, est in read_recording(DEMO, topics=[codec.TOPIC_ESTIMATE]):
            step = controller.on_estimate(est, est.time_s)
            if step.kind != "keep" or step.maps:
                step_causes.append(step.cause)
            map_causes += [c.cause for c in step.changes]
        lines = list(result_lines(demo_run))
        decisions = [x for x in lines if x["type"] == "decision"]
        maps = [x for x in lines if x["type"] == "map"]
        assert [x["cause"] for x in decisions] == step_causes
        assert [x["cause"] for x in maps] == map_causes
        assert [x["kind"] for x in maps] == [e.kind for e in demo_run.events]
        # the fallback map's cause is its kind; every other map names a change-control rule
        assert {m["cause"] for m in maps if m["kind"] == "fallback"} == {"fallback"}
        assert all(m["cause"] and m["cause"] != "keep" for m in maps)
        rejected = [x for x in decisions if x["kind"] == "rejected"]
        assert all(x["cause"] == x["reason"] for x in rejected)

    def test_export_tables_carry_the_same_causes_as_the_lines(self, demo_run):
        """``--export`` tables name the rule behind every decision and map, as the lines do."""
        tables = result_tables(demo_run)
        lines = list(result_lines(demo_run))
        maps = [x["cause"] for x in lines if x["type"] == "map"]
        assert list(tables.table("maps")["cause"]) == maps
        decisions = tables.table("decisions")
        shown = {(x["frame"], x["cause"]) for x in lines if x["type"] == "decision"}
        assert shown <= set(zip(decisions["frame"].tolist(), decisions["cause"].tolist()))
        assert len(decisions["cause"]) == len(demo_run.timeline)

    def test_result_survives_pickling(self):
        """Sweep tasks return results from worker processes: the result must pickle."""
        r = replay_offline(CONFIG, DEMO, window=Window(stop_s=4.5), keep_snr=True)
        back = pickle.loads(pickle.dumps(r))
        assert back.summary == r.summary and back.events == r.events
        assert np.array_equal(back.maps[-1].bits, r.maps[-1].bits)
        assert np.array_equal(back.snr_db, r.snr_db)

    def test_iq_capture_goes_through_the_receiver(self):
        r = replay_offline(None, ROOT / "replay" / "link-demo.sigmf-meta")
        assert r.source_kind == "iq" and r.summary.frames > 0 and r.maps


class TestLiveMargin:
    def test_matches_the_gap_formula(self, demo_run):
        """The live margin of a loaded tone is 10 log10(p SNR / (Gamma (2^b - 1))): the
        SNR-gap approximation b = log2(1 + SNR p / Gamma) solved for the spare factor
        (Forney and Ungerboeck, IEEE Trans. Inf. Theory 44(6), 1998; from memory)."""
        cfg = load_config(CONFIG)
        gap_db = demo_run.maps[0].gap_db
        assert gap_db == pytest.approx(cfg.loading.effective_gap_db())
        # Re-run to the 100th frame and recompute the margin from the tracked SNR by hand.
        plan, loader, est, chg = build_core(cfg)
        c = build_controller(cfg, plan, loader, est, chg, epoch="x")
        for e in [r for _t, r in read_recording(DEMO, topics=["estimate"])][:100]:
            c.on_estimate(e, e.time_s)
        m, snr_db = c.current_map, c.last_tracked.snr_db
        loaded = m.bits > 0
        need = 10 ** (gap_db / 10) * (2.0 ** m.bits[loaded] - 1)
        by_hand = 10 * np.log10(m.power_lin[loaded] * 10 ** (snr_db[loaded] / 10) / need)
        assert demo_run.timeline.live_margin_db[99] == pytest.approx(by_hand.min(), abs=1e-4)

    def test_every_frame_matches_the_gap_formula(self, demo_run):
        """The same formula as above on every replayed frame, with the map in force and the
        tracked SNR after that frame (the replay works the live margin out a run of frames
        under one map at a time; this checks the runs, their ends and the frames without a
        map, which have none)."""
        cfg = load_config(CONFIG)
        plan, loader, est, chg = build_core(cfg)
        c = build_controller(cfg, plan, loader, est, chg, epoch="x")
        expected = []
        for e in (r for _t, r in read_recording(DEMO, topics=["estimate"])):
            c.on_estimate(e, e.time_s)
            m, tracked = c.current_map, c.last_tracked
            if m is None or tracked is None or not (m.bits > 0).any():
                expected.append(math.nan)
                continue
            loaded = m.bits > 0
            need = 10 ** (m.gap_db / 10) * (2.0 ** m.bits[loaded] - 1)
            snr = 10 ** (tracked.snr_db[loaded] / 10)
            expected.append(float((10 * np.log10(m.power_lin[loaded] * snr / need)).min()))
        live = demo_run.timeline.live_margin_db
        assert len(live) == len(expected) > 2 * 256   # several blocks of the replay's runs
        assert np.array_equal(np.isnan(live), np.isnan(expected))
        assert np.allclose(live, expected, atol=1e-4, equal_nan=True)

    def test_decoding_ahead_changes_nothing(self, demo_run, monkeypatch):
        """An unpaced replay decodes estimates a block at a time; one at a time gives the
        same run, to the byte."""
        monkeypatch.setattr(offline, "DECODE_BLOCK", 1)
        one = replay_offline(CONFIG, DEMO, keep_snr=True)
        a = [json.dumps(json_safe(x)) for x in result_lines(demo_run)]
        assert a == [json.dumps(json_safe(x)) for x in result_lines(one)]
        for name in ("frame", "time_s", "bits_per_symbol", "margin_db", "live_margin_db",
                     "seq", "fallback"):
            assert getattr(one.timeline, name).tobytes() == \
                getattr(demo_run.timeline, name).tobytes()
        assert one.summary == demo_run.summary and one.events == demo_run.events


def _timeline(kinds, rates):
    n = len(kinds)
    return Timeline(frame=np.arange(n), time_s=np.arange(n) * 0.02, kind=tuple(kinds),
                    reason=tuple(f"why {k}" for k in kinds), bits_per_symbol=np.array(rates),
                    margin_db=np.zeros(n), live_margin_db=np.zeros(n),
                    seq=np.zeros(n, dtype=np.int64), fallback=np.zeros(n, dtype=bool))


def _result(tl: Timeline, run: OfflineResult) -> OfflineResult:
    return OfflineResult(source="made up", source_kind="estimates", epoch="e", settings=(),
                         plan_id=run.plan_id, tone_index=run.tone_index,
                         symbol_rate_hz=run.symbol_rate_hz, maps=(), events=(),
                         timeline=tl, summary=run.summary)


class TestCompare:
    def test_same_settings_do_not_diverge(self, demo_run):
        again = replay_offline(CONFIG, DEMO)
        cmp = compare_results(demo_run, again)
        assert cmp.divergence is None and cmp.same_frames

    def test_fallback_setting_diverges_at_the_first_estimate_after_the_hole(self):
        """Constructed case: two settings that differ only in the fallback map must agree up
        to the step that sends it, the first estimate after the recording's hole."""
        window = Window(start_s=14.0)
        a = replay_offline(CONFIG, DEMO, window=window)
        b = replay_offline(CONFIG, DEMO, window=window, overrides=["fallback.bits=3"])
        d = compare_results(a, b).divergence
        after = a.timeline.time_s[a.timeline.time_s >= GAP_S[0]]
        assert d is not None and d.time_s == after[0]
        assert d.a_kind == d.b_kind == "fallback"
        assert "(2 bits" in d.a_reason and "(3 bits" in d.b_reason

    def test_hand_made_timelines(self, demo_run):
        a = _result(_timeline(["keep"] * 5 + ["reload"] + ["keep"] * 4, [100] * 10), demo_run)
        b = _result(_timeline(["keep"] * 7 + ["bit_swap"] + ["keep"] * 2, [100] * 10), demo_run)
        d = compare_results(a, b).divergence
        assert (d.index, d.a_kind, d.b_kind) == (5, "reload", "keep")

    def test_keep_reasons_alone_are_no_divergence(self, demo_run):
        ta = _timeline(["keep"] * 4, [10] * 4)
        tb = Timeline(**{**ta.__dict__, "reason": ("other words",) * 4})
        assert compare_results(_result(ta, demo_run), _result(tb, demo_run)).divergence is None

    def test_map_events_are_compared(self, demo_run):
        assert isinstance(demo_run.events[0], MapEvent)
        assert math.isfinite(demo_run.events[0].time_s)
