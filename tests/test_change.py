"""Change control (brimline.daemon.core.change).

The behaviour follows the idea of DSL online rate adaptation (ITU-T G.997.1 as described in IETF
RFC 5650): separate downshift and upshift margins, a minimum time before each kind of change,
upshift slower than downshift; and fast rate reduction when many tones degrade at once (ITU-T
G.9701 sec. 13.3.1.1). The loading constraints every published map must meet are those of the
loader (total power within budget, per-tone ceiling, allowed bit levels), with the per-tone power
``gap * (2**b - 1) / snr`` of the SNR-gap approximation (CHECKS.md, "SNR gap").
"""

import math

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from brimline.daemon.core.change import ChangeControl
from brimline.daemon.core.estimator import Estimator
from brimline.daemon.core.loading import Loader
from brimline.daemon.errors import ConfigError, InfeasibleError
from brimline.daemon.records import DecisionKind, Estimate, Tracked
from brimline.daemon.runtime.config import ChangeSection, load_config

GAP_DB = 12.8   # common-practice uncoded QAM gap 9.8 dB at SER 1e-7 plus a 3 dB target margin
N = 128
TONES = np.arange(N) - N // 2
FPS = 100.0


def loader(**kw):
    kw.setdefault("gap_db", GAP_DB)
    return Loader(**kw)


def tracked(snr_db, *, std_db=0.0, plan_id="plan-a", tones=None):
    snr_db = np.asarray(snr_db, dtype=float)
    std = np.broadcast_to(np.asarray(std_db, dtype=float), snr_db.shape)
    return Tracked(plan_id=plan_id, tone_index=TONES[:snr_db.size] if tones is None else tones,
                   snr_db=snr_db, std_db=std, effective_snr_db=snr_db - std, age_s=0.0,
                   frames=10)


def profile(n=N):
    """A frequency-selective but smooth SNR profile, 22..38 dB (invented test channel)."""
    k = np.arange(n)
    return 30.0 + 6.0 * np.sin(2 * np.pi * k / 97.0) + 2.0 * np.cos(2 * np.pi * k / 23.0)


def check_constraints(alloc, ld, n):
    """The loading constraints: allowed bit levels, no power on unloaded tones, ceiling, budget."""
    assert np.isin(alloc.bits, ld.bits).all()
    assert (alloc.power >= 0).all()
    assert (alloc.power[alloc.bits == 0] == 0).all()
    assert (alloc.power <= 10 ** (ld.cap_db / 10) * (1 + 1e-9)).all()
    assert alloc.power.sum() <= n * 10 ** (ld.budget_db / 10) * (1 + 1e-9)
    assert alloc.total_bits == alloc.bits.sum()


class Link:
    """Estimator + change control fed synthetic estimates at FPS frames per second."""

    def __init__(self, rng, *, noise_db=1.0, n=N, change=None, estimator=None):
        self.rng, self.noise_db, self.n = rng, noise_db, n
        self.tones = np.arange(n) - n // 2
        self.est = Estimator(**(estimator or {}))
        self.ld = loader()
        self.cc = ChangeControl(self.ld, **(change or {}))
        self.k = 0
        self.log = []

    def step(self, truth_db, *, noise_db=None):
        t = self.k / FPS
        self.k += 1
        noise = self.noise_db if noise_db is None else noise_db
        x = truth_db + self.rng.normal(0.0, noise, self.n)
        e = Estimate(frame=self.k, time_s=t, plan_id="plan-a", tone_index=self.tones,
                     channel=np.ones(self.n), noise_var=np.ones(self.n), snr_db=x)
        self.est.update(e, t)
        tr = self.est.tracked(t)
        d = self.cc.decide(tr, t)
        self.log.append((t, d, tr))
        return d

    def run(self, truth_db, seconds):
        return [self.step(truth_db) for _ in range(int(round(seconds * FPS)))]


def changes(decisions):
    return [d for d in decisions if d.kind is not DecisionKind.KEEP]


class TestConfig:
    def test_section_keys_are_the_constructor_kwargs(self):
        cc = ChangeControl(loader(), **ChangeSection().model_dump())
        assert cc.up_dwell_s > cc.down_dwell_s

    @pytest.mark.parametrize("kwargs, match", [
        (dict(downshift_margin_db=2.0, upshift_margin_db=1.0), r"downshift_margin_db=2.0"),
        (dict(max_maps_per_s=0.0), r"max_maps_per_s=0.0"),
        (dict(emergency_fraction=0.0), r"emergency_fraction=0.0"),
        (dict(down_persist_s=-0.1), r"down_persist_s=-0.1"),
        (dict(down_deep_db=-1.0), r"down_deep_db=-1.0"),
    ])
    def test_bad_settings_name_the_key(self, kwargs, match):
        with pytest.raises(ValueError, match=match):
            ChangeControl(loader(), **kwargs)
        with pytest.raises(Exception, match=match):
            ChangeSection(**kwargs)

    def test_yaml_errors_name_the_key(self, tmp_path):
        path = tmp_path / "c.yaml"
        path.write_text("change:\n  up_dwell_s: 10.0\n  swap_max_tones: -1\n")
        with pytest.raises(ConfigError, match=r"line 3: change.swap_max_tones=-1"):
            load_config(path)
        path.write_text("change:\n  downshift_margin_db: -2.0\n  up_dwell_s: 30\n")
        assert load_config(path).change.up_dwell_s == 30

    def test_upgrade_dwell_not_shorter_than_downgrade(self):
        with pytest.raises(Exception, match="up_dwell_s=0.05"):
            ChangeSection(up_dwell_s=0.05, down_dwell_s=0.1)


class TestDecisions:
    def test_first_map_is_a_reload_of_the_loader(self):
        ld = loader()
        cc = ChangeControl(ld)
        d = cc.decide(tracked(profile()), 0.0)
        assert d.kind is DecisionKind.RELOAD and d.reason.startswith("reload: first map")
        ref = ld(10 ** (profile() / 10))
        np.testing.assert_array_equal(cc.current.bits, ref.bits)
        assert d.tones_changed == N

    def test_keep_reports_the_worst_margin(self):
        cc = ChangeControl(loader())
        cc.decide(tracked(profile()), 0.0)
        d = cc.decide(tracked(profile()), 0.01)
        assert d.kind is DecisionKind.KEEP and d.allocation is None
        assert d.reason.startswith("margins ok (") and "dB worst at tone" in d.reason

    def test_one_tone_losing_margin_gets_a_bit_swap(self):
        ld = loader()
        cc = ChangeControl(ld)
        snr = profile()
        first = cc.decide(tracked(snr), 0.0).allocation
        snr2 = snr.copy()
        snr2[37] -= 10.0
        d = cc.decide(tracked(snr2), 1.0)
        assert d.kind is DecisionKind.BIT_SWAP
        assert d.reason.startswith("bit swap: 1 tone below downshift margin (")
        assert f"worst at tone {TONES[37]})" in d.reason
        alloc = d.allocation
        assert alloc.bits[37] < first.bits[37]
        assert 1 <= d.tones_changed <= cc.swap_max_tones
        assert first.total_bits - alloc.total_bits <= cc.swap_max_loss_bits
        check_constraints(alloc, ld, N)
        margins = ld.tone_margin_db(alloc.bits, alloc.power, 10 ** (snr2 / 10))
        assert margins.min() >= cc.downshift_margin_db

    def test_many_tones_losing_margin_reload(self):
        cc = ChangeControl(loader())
        snr = profile()
        first = cc.decide(tracked(snr), 0.0).allocation
        snr2 = snr.copy()
        snr2[10:30] -= 8.0          # 20 tones: more than a swap, less than an emergency
        d = cc.decide(tracked(snr2), 1.0)
        assert d.kind is DecisionKind.RELOAD
        assert d.reason.startswith("reload: 20 tones below downshift margin (")
        # the limit that made it a reload, not a bit swap, is named in the cause and the words
        assert d.cause == "swap_tones"
        assert "too many for a bit swap (20 tones to repair > swap_max_tones 16)" in d.reason
        delta = d.allocation.total_bits - first.total_bits
        assert d.reason.endswith(f"; {delta:+d} bits") and delta < 0


    def test_downgrade_waits_for_its_dwell_and_the_rate_limit(self):
        cc = ChangeControl(loader(), down_dwell_s=0.2, max_maps_per_s=10.0)
        snr = profile()
        cc.decide(tracked(snr), 0.0)
        snr[5] -= 10
        d = cc.decide(tracked(snr), 0.05)
        assert d.kind is DecisionKind.KEEP and "change in 0.15 s" in d.reason
        assert cc.counters["held_dwell"] == 1
        assert cc.decide(tracked(snr), 0.2).kind is DecisionKind.BIT_SWAP

    def test_a_short_dip_below_the_downshift_margin_changes_nothing(self):
        """Downshift persistence: a tone counts as below the downshift margin only once it has
        stayed below it for down_persist_s. This is the downshift time interval that goes with
        the downshift noise margin of DSL rate adaptation (ITU-T G.997.1 as described in IETF
        RFC 5650; from memory). 50 frames/s: 0.06 s is 3 frame times, so one or two low frames
        change nothing and the 4th low frame in a row gets the bit swap."""
        ld = loader()
        cc = ChangeControl(ld, down_persist_s=0.06, down_deep_db=6.0)
        snr = profile()
        first = cc.decide(tracked(snr), 0.0).allocation
        m0 = ld.tone_margin_db(first.bits, first.power, 10 ** (snr / 10))
        dip = snr.copy()
        dip[37] -= m0[37] + 3.0             # margin -3 dB: below -1.5, not a deep drop
        fps, t = 50.0, 1.0
        pattern = [1, 0, 1, 1, 0, 0, 1, 1, 0, 1, 0]   # dips of one or two frames, recoveries
        for k, is_low in enumerate(pattern):
            d = cc.decide(tracked(dip if is_low else snr), t + k / fps)
            assert d.kind is DecisionKind.KEEP, d.reason
            if is_low:
                assert d.reason.startswith("1 tone below downshift margin (")
                assert "of 0.06 s" in d.reason
        assert cc.counters["held_persist"] == sum(pattern)
        assert cc.current is first
        t += len(pattern) / fps
        ds = [cc.decide(tracked(dip), t + k / fps) for k in range(4)]
        assert [d.kind for d in ds[:3]] == [DecisionKind.KEEP] * 3
        assert ds[3].kind is DecisionKind.BIT_SWAP
        assert ds[3].reason.startswith("bit swap: 1 tone below downshift margin (")
        check_constraints(ds[3].allocation, ld, N)

    def test_deep_drop_and_band_drop_do_not_wait_for_persistence(self):
        """A tone more than down_deep_db below the downshift margin counts at once; so do the
        tones of an emergency (many tones low while the mean fell)."""
        ld = loader()
        cc = ChangeControl(ld, down_persist_s=0.5, down_deep_db=6.0)
        snr = profile()
        first = cc.decide(tracked(snr), 0.0).allocation
        m0 = ld.tone_margin_db(first.bits, first.power, 10 ** (snr / 10))
        deep = snr.copy()
        deep[37] -= m0[37] + 1.5 + 6.5      # margin -8 dB: 6.5 dB below the downshift margin
        assert cc.decide(tracked(deep), 1.0).kind is DecisionKind.BIT_SWAP
        d = cc.decide(tracked(snr - 5.0), 2.0)   # margins near -5 dB: not deep, band-wide
        assert d.kind is DecisionKind.EMERGENCY, d.reason
        never = ChangeControl(ld, down_persist_s=0.5, down_deep_db=math.inf)
        never.decide(tracked(snr), 0.0)
        assert never.decide(tracked(deep), 1.0).kind is DecisionKind.KEEP
        assert never.decide(tracked(deep), 1.5).kind is DecisionKind.BIT_SWAP

    def test_upgrade_needs_margin_gain_and_persistence(self):
        """Upshift: the gain must hold with upshift_margin_db of extra margin, for up_dwell_s
        without a break (the persistence idea of DSL upshift times, RFC 5650)."""
        ld = loader()
        cc = ChangeControl(ld, up_dwell_s=5.0, upshift_margin_db=1.5, min_gain_bits=4,
                           upgrade_check_s=0.25)
        snr = profile()
        cc.decide(tracked(snr), 0.0)
        small = snr + 1.0             # 1 dB better: below the upshift margin, no upgrade
        assert changes([cc.decide(tracked(small), t) for t in np.arange(0.1, 20, 0.1)]) == []
        better = snr + 4.0
        ds = [(t, cc.decide(tracked(better), t)) for t in np.arange(20.0, 30.0, 0.05)]
        ups = [(t, d) for t, d in ds if d.kind is not DecisionKind.KEEP]
        assert len(ups) == 1 and ups[0][1].reason.startswith("upgrade: +")
        # the wait scales with the evidence: 5 s for min_gain_bits, 5 s * 4 / gain for more
        gain = int(ups[0][1].reason.split("(+")[1].split()[0])
        assert gain > 4
        assert ups[0][0] == pytest.approx(20.0 + 5.0 * 4 / gain, abs=0.26)
        assert any("upgrade pending for" in d.reason for t, d in ds if t < ups[0][0])
        # a break in the gain restarts the wait
        # (lookahead off: the synthetic 4 dB step back within one call would read as a fall
        # to extrapolate, which is the lookahead's business, not this rule's)
        # (min_gain_bits at the gain itself: the full up_dwell_s applies)
        cc2 = ChangeControl(ld, up_dwell_s=2.0, upgrade_check_s=0.25, lookahead_s=0.0,
                            min_gain_bits=gain)
        cc2.decide(tracked(snr), 0.0)
        seq = [(t, better if not 1.0 <= t < 1.3 else snr) for t in np.arange(0.05, 4.0, 0.05)]
        ups = [t for t, x in seq if cc2.decide(tracked(x), t).kind is not DecisionKind.KEEP]
        assert len(ups) == 1 and ups[0] >= 1.3 + 2.0 - 1e-9

    def test_emergency_on_many_tones_or_mean_drop(self):
        cc = ChangeControl(loader(), emergency_fraction=0.25, emergency_drop_db=6.0,
                           down_dwell_s=1.0, max_maps_per_s=10.0)
        snr = profile()
        cc.decide(tracked(snr), 0.0)
        d = cc.decide(tracked(snr - 5.0), 0.05)   # the map rate limit still holds it
        assert d.kind is DecisionKind.KEEP and d.reason.startswith("emergency pending: ")
        d = cc.decide(tracked(snr - 5.0), 0.1)    # inside the dwell: emergencies bypass it
        assert d.kind is DecisionKind.EMERGENCY and d.reason.startswith("emergency: ")
        cc2 = ChangeControl(loader(), emergency_fraction=1.0, emergency_drop_db=6.0)
        cc2.decide(tracked(snr), 0.0)
        d = cc2.decide(tracked(snr - 7.0), 0.5)
        assert d.kind is DecisionKind.EMERGENCY and "mean SNR fell 7.0 dB since the map" in d.reason
        assert "3 dB extra margin" in d.reason

    def test_emergency_map_has_its_extra_margin(self):
        ld = loader()
        cc = ChangeControl(ld, emergency_margin_db=3.0)
        snr = profile()
        cc.decide(tracked(snr), 0.0)
        alloc = cc.decide(tracked(snr - 6.0), 0.5).allocation
        margins = ld.tone_margin_db(alloc.bits, alloc.power, 10 ** ((snr - 6.0) / 10))
        assert margins[alloc.bits > 0].min() >= 3.0 - 1e-9

    def test_forced_fallback_then_fresh_map(self):
        ld = loader()
        cc = ChangeControl(ld)
        cc.decide(tracked(profile()), 0.0)
        safe = ld(np.full(N, 10.0))
        d = cc.force(safe, "fallback", "estimates stale for 2.0 s", 1.0)
        assert d.kind is DecisionKind.FALLBACK and cc.current is safe
        assert cc.decide(tracked(profile()), 1.05).kind is DecisionKind.KEEP  # rate limit
        d = cc.decide(tracked(profile()), 1.2)
        assert d.kind is DecisionKind.RELOAD and "first map" in d.reason
        with pytest.raises(ValueError, match="keep"):
            cc.force(safe, "keep", "", 2.0)

    def test_non_finite_tracked_view_keeps_the_map(self):
        cc = ChangeControl(loader())
        first = cc.decide(tracked(profile()), 0.0).allocation
        bad = profile()
        bad[3] = np.nan
        d = cc.decide(tracked(bad), 1.0)
        assert d.kind is DecisionKind.KEEP and "not finite" in d.reason
        assert cc.current is first and cc.counters["bad_input"] == 1
        huge = profile()
        huge[5] = 1e6                    # absurd but finite: capped, no overflow
        assert cc.decide(tracked(huge), 2.0).kind in set(DecisionKind)

    def test_new_plan_reloads(self):
        cc = ChangeControl(loader())
        cc.decide(tracked(profile()), 0.0)
        d = cc.decide(tracked(profile(40), plan_id="plan-b", tones=np.arange(40)), 1.0)
        assert d.kind is DecisionKind.RELOAD and "plan-b" in d.reason
        assert cc.current.bits.size == 40


class TestMarginMode:
    """Margin mode loads a fixed number of bits with the most margin; change control keeps it."""

    def _cc(self):
        target = int(loader()(10 ** (profile() / 10)).total_bits * 0.8)
        return ChangeControl(loader(mode="margin", target_bits=target)), target

    def test_swaps_and_reloads_keep_the_target(self):
        cc, target = self._cc()
        assert cc.swap_max_loss_bits == 0
        snr = profile()
        assert cc.decide(tracked(snr), 0.0).allocation.total_bits == target
        snr2 = snr.copy()
        snr2[37] -= 15.0
        d = cc.decide(tracked(snr2), 1.0)
        assert d.kind in (DecisionKind.BIT_SWAP, DecisionKind.RELOAD)
        assert d.allocation.total_bits == target
        check_constraints(d.allocation, cc.loader, N)

    def test_infeasible_target_falls_back_to_rate_and_recovers(self):
        cc, target = self._cc()
        snr = profile()
        cc.decide(tracked(snr), 0.0)
        d = cc.decide(tracked(snr - 12.0), 1.0)
        assert d.kind is DecisionKind.EMERGENCY
        assert d.reason.endswith("(target bits infeasible: loaded for rate)")
        assert d.allocation.total_bits < target and cc.counters["infeasible"] >= 1
        check_constraints(d.allocation, cc.loader, N)
        ups = changes([cc.decide(tracked(snr), t) for t in np.arange(1.1, 8.0, 0.1)])
        assert ups and ups[-1].allocation.total_bits == target


class TestWithEstimator:
    """Estimator and change control together on synthetic estimates (1 dB estimation noise)."""

    def test_static_noisy_channel_does_not_flap(self, rng):
        link = Link(rng)
        decisions = link.run(profile(), 40.0)
        late = changes(decisions[int(10 * FPS):])
        assert late == [], [d.reason for d in late]
        assert len(changes(decisions)) <= 3      # first map, then at most settling upgrades

    @pytest.mark.parametrize("band, kind", [(slice(40, 41), DecisionKind.BIT_SWAP),
                                            (slice(40, 70), DecisionKind.RELOAD)])
    def test_band_drop_gets_a_new_map_within_bounded_frames(self, rng, band, kind):
        """A 12 dB drop lies outside the outlier gate: confirmed after confirm_frames frames,
        then changed at once (the dwell since the last map is long past)."""
        link = Link(rng)
        link.run(profile(), 12.0)
        truth = profile()
        truth[band] -= 12.0
        bound = link.est.confirm_frames
        after = [link.step(truth) for _ in range(bound)]
        new = changes(after)
        assert [d.kind for d in new] == [kind]
        _, _, tr = link.log[-1]
        alloc = link.cc.current
        margins = link.ld.tone_margin_db(alloc.bits, alloc.power, 10 ** (tr.effective_snr_db / 10))
        assert margins.min() >= link.cc.downshift_margin_db
        assert changes(link.run(truth, 5.0)) == []

    def test_emergency_fires_and_recovers(self, rng):
        link = Link(rng)
        link.run(profile(), 12.0)
        before = link.cc.current.total_bits
        drop = [link.step(profile() - 10.0) for _ in range(link.est.confirm_frames)]
        assert [d.kind for d in changes(drop)] == [DecisionKind.EMERGENCY]
        low = link.cc.current.total_bits
        assert low < 0.8 * before
        # the emergency margin is given back by one upgrade after the upgrade dwell
        during = changes(link.run(profile() - 10.0, link.cc.up_dwell_s + 3.0))
        assert len(during) == 1 and during[0].reason.startswith("upgrade")
        assert during[0].allocation.total_bits > low
        back = link.run(profile(), link.cc.up_dwell_s + 2.0)
        ups = changes(back)
        assert ups and all(d.kind is DecisionKind.RELOAD for d in ups)
        assert all(d.reason.startswith("upgrade") for d in ups)
        assert link.cc.current.total_bits >= before - link.cc.min_gain_bits - 2

    def test_single_outlier_frame_changes_nothing(self, rng):
        link = Link(rng)
        link.run(profile(), 12.0)
        before = link.cc.current
        clipped = link.step(profile() - 25.0)
        assert clipped.kind is DecisionKind.KEEP
        assert link.est.counters["frame_outlier"] == 1
        assert changes(link.run(profile(), 2.0)) == []
        assert link.cc.current is before

    def test_replay_gives_the_same_decisions(self):
        def run():
            link = Link(np.random.default_rng(7), n=32)
            truth = profile(32)
            out = []
            for k in range(1500):
                if k == 700:
                    truth = truth.copy()
                    truth[3:9] -= 9
                out.append(link.step(truth))
            return out
        a, b = run(), run()
        assert [(d.kind, d.reason) for d in a] == [(d.kind, d.reason) for d in b]
        for x, y in zip(changes(a), changes(b)):
            np.testing.assert_array_equal(x.allocation.bits, y.allocation.bits)
            np.testing.assert_array_equal(x.allocation.power, y.allocation.power)


class TestCommonMode:
    """A change of the whole band is one decision; the map's margin does not sag for long.
    (Behaviour asked for by the project's issue on drift and fading; the numbers are the
    module's documented rules, not external values.)"""

    def test_gradual_band_fall_is_reloads_not_swaps(self, rng):
        """The band falls 2 dB in 0.1 dB steps, each tone with its own fixed offset of up to
        +-0.3 dB (invented spread): one reload per common_drop_db, no bit swaps."""
        ld = loader()
        cc = ChangeControl(ld, lookahead_s=0.0)
        snr = profile()
        cc.decide(tracked(snr), 0.0)
        spread = rng.uniform(-0.3, 0.3, N)
        kinds = []
        for k in range(1, 21):
            d = cc.decide(tracked(snr - 0.1 * k + spread * (k / 20)), k * 0.5)
            if d.kind is not DecisionKind.KEEP:
                kinds.append((d.kind, d.reason))
        assert 1 <= len(kinds) <= 2, kinds
        assert all(k is DecisionKind.RELOAD and "band fell" in r for k, r in kinds), kinds
        assert cc.counters["bit_swap"] == 0

    def test_uniform_drop_is_one_decision(self):
        cc = ChangeControl(loader())
        snr = profile()
        cc.decide(tracked(snr), 0.0)
        out = [cc.decide(tracked(snr - 1.4), 1.0 + 0.01 * k) for k in range(100)]
        assert len(changes(out)) == 1 and "band fell" in changes(out)[0].reason

    def test_sagging_map_is_reloaded_after_sag_max_s(self):
        """A common fall of 0.8 dB (below common_drop_db, above sag_db) is left alone for
        sag_max_s, then reloaded once."""
        cc = ChangeControl(loader(), sag_max_s=3.0)
        snr = profile()
        cc.decide(tracked(snr), 0.0)
        times = np.arange(1.0, 8.0, 0.05)
        out = [(t, cc.decide(tracked(snr - 0.8), t)) for t in times]
        made = [(t, d) for t, d in out if d.kind is not DecisionKind.KEEP]
        assert len(made) == 1 and "median margin" in made[0][1].reason
        assert made[0][0] == pytest.approx(1.0 + 3.0, abs=0.06)

    def test_slow_drift_makes_few_maps(self, rng):
        """A sinusoidal gain drift of 2 dB peak with a 60 s period and 1 dB estimation noise:
        at most 6 maps in the minute after the first 10 s, none of them a bit swap."""
        link = Link(rng)
        base = profile()
        out = []
        for k in range(int(70 * FPS)):
            t = k / FPS
            d = link.step(base + 2.0 * math.sin(2 * math.pi * max(t - 10.0, 0.0) / 60.0))
            if t >= 10.0:
                out.append(d)
        made = changes(out)
        assert len(made) <= 6, [d.reason for d in made]
        assert all(d.kind is not DecisionKind.BIT_SWAP for d in made), [d.reason for d in made]

    def test_lookahead_loads_a_falling_tone_lower(self):
        """A tone whose SNR falls steadily is loaded for where it will be lookahead_s on."""
        plain, ahead = ChangeControl(loader(), lookahead_s=0.0), ChangeControl(loader())
        snr = profile()
        for cc in (plain, ahead):
            for k in range(30):
                x = snr.copy()
                x[10:20] -= 20.0 * k * 0.01        # falling 20 dB/s
                cc.decide(tracked(x), k * 0.01)
        assert ahead.current.bits[10:20].sum() <= plain.current.bits[10:20].sum()
        assert ahead.current.bits[12:18].sum() < plain.current.bits[12:18].sum()


# ----------------------------------------------------------------------------- properties

BIT_SETS = [list(range(9)), [0, 1, 2, 4, 6, 8], [0, 2, 4, 6], list(range(11))]


@st.composite
def scenarios(draw):
    n = draw(st.integers(4, 24))
    ld = dict(bits=draw(st.sampled_from(BIT_SETS)), budget_db=draw(st.floats(-3.0, 3.0)),
              cap_db=draw(st.sampled_from([math.inf, 0.0, 2.0, 4.0])))
    if draw(st.booleans()):
        ld.update(mode="margin", target_bits=draw(st.integers(0, 6 * n)))
    base = draw(st.lists(st.floats(0.0, 45.0), min_size=n, max_size=n))
    steps = draw(st.lists(st.tuples(
        st.floats(0.001, 8.0),                                   # time step, s
        st.lists(st.floats(-12.0, 12.0), min_size=n, max_size=n),  # change of each tone, dB
        st.floats(0.0, 2.0)),                                    # tracked std, dB
        min_size=1, max_size=25))
    return n, ld, np.array(base), steps


@settings(max_examples=120, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(scenarios())
def test_published_maps_meet_the_constraints_and_thresholds(scenario):
    """Every map change control publishes satisfies the loading constraints; margins, dwell
    times and the map rate limit are respected; margin mode keeps its target unless infeasible."""
    n, ld_kw, base, steps = scenario
    ld = loader(**ld_kw)
    cc = ChangeControl(ld)
    tones = np.arange(n)
    t = 0.0
    last_map_t = last_restart_t = None
    snr_db = base
    for dt, delta, std in steps:
        t += dt
        snr_db = np.clip(snr_db + np.array(delta), -10.0, 50.0)
        tr = Tracked(plan_id="p", tone_index=tones, snr_db=snr_db, std_db=np.full(n, std),
                     effective_snr_db=snr_db - std, age_s=0.0, frames=5)
        prev = cc.current
        d = cc.decide(tr, t)
        snr = 10 ** (tr.effective_snr_db / 10)
        if d.kind is DecisionKind.KEEP:
            assert cc.current is prev
            if d.reason.startswith("margins ok"):
                # A common fall of the band smaller than common_drop_db is left to the
                # common-mode rule, so a tone may sit that much below the downshift margin.
                m = ld.tone_margin_db(prev.bits, prev.power, snr)
                assert m.min() >= cc.downshift_margin_db - cc.common_drop_db - 1e-9
            continue
        alloc = d.allocation
        assert cc.current is alloc
        check_constraints(alloc, ld, n)
        margins = ld.tone_margin_db(alloc.bits, alloc.power, snr)
        assert margins.min() >= cc.downshift_margin_db - 1e-9
        if last_map_t is not None:
            assert t - last_map_t >= 1 / cc.max_maps_per_s - 1e-12
            if "upgrade" in d.reason:   # upgrades, first maps, emergencies: up_dwell_s apart
                assert t - last_restart_t >= cc.up_dwell_s
            if d.reason.startswith("upgrade"):
                try:
                    guarded = ld(snr * 10 ** (-cc.upshift_margin_db / 10))
                except InfeasibleError:
                    guarded = ld.rate(snr * 10 ** (-cc.upshift_margin_db / 10))
                assert guarded.total_bits - prev.total_bits >= cc.min_gain_bits
            elif d.kind is DecisionKind.BIT_SWAP or d.reason.startswith("reload: "):
                assert t - last_map_t >= cc.down_dwell_s
        if ld.mode == "margin":   # swaps keep the rate exactly; loads hit the target if they can
            if d.kind is DecisionKind.BIT_SWAP:
                assert alloc.total_bits == prev.total_bits
            elif "infeasible" not in d.reason:
                assert alloc.total_bits == ld.target_bits
        if d.kind is DecisionKind.BIT_SWAP:
            assert d.tones_changed <= cc.swap_max_tones
            assert prev.total_bits - alloc.total_bits <= cc.swap_max_loss_bits
        last_map_t = t
        if d.kind is DecisionKind.EMERGENCY or "upgrade" in d.reason or "first map" in d.reason:
            last_restart_t = t


# ----------------------------------------------------------------------------- on the link model


def test_band_fade_on_the_simulated_link_gets_a_new_map_quickly():
    """The link model's transmitter, static EVA channel (3GPP TS 36.101 Table B.2.1-3) and
    receiver feed the estimator; a sudden 15 dB fade of 41 tones at t = 3 s must give a new map
    within confirm_frames + 2 frames (one frame may straddle the fade), with no loaded tone below
    the downshift margin afterwards and no further change on the then static channel."""
    from brimline.drivers.link.frame import make_plan
    from brimline.drivers.sources.sim import SimDriver

    plan = make_plan()
    fade = dict(start_s=3.0, first_tone=20, last_tone=60, depth_db=15.0)
    sim = SimDriver(plan=plan, profile="eva", doppler_hz=0.0, snr_db=28.0, realtime=False,
                    seed=4, frame_rate_hz=FPS, events=[fade])
    est = Estimator()
    ld = loader()
    cc = ChangeControl(ld)
    log = []
    for _ in range(int(4.5 * FPS)):
        e = sim.step()
        if e is None:
            continue
        est.update(e, e.time_s)
        log.append((e.time_s, cc.decide(est.tracked(e.time_s), e.time_s)))
    before = [d for t, d in log if 1.5 <= t < 3.0 and d.kind is not DecisionKind.KEEP]
    assert before == [], [d.reason for d in before]
    after = [(t, d) for t, d in log if t >= 3.0 and d.kind is not DecisionKind.KEEP]
    assert after, "no new map after the fade"
    t_first, first = after[0]
    assert t_first <= 3.0 + (est.confirm_frames + 1) / FPS + 1e-9, first.reason
    assert all(t < t_first + 0.5 for t, _ in after), [d.reason for _, d in after]
    alloc = cc.current
    tr = est.tracked(4.5)
    margins = ld.tone_margin_db(alloc.bits, alloc.power, 10 ** (tr.effective_snr_db / 10))
    assert margins.min() >= cc.downshift_margin_db
    faded = (plan.data_tones >= 20) & (plan.data_tones <= 60)
    assert alloc.bits[faded].mean() < 0.6 * log[0][1].allocation.bits[faded].mean()


class TestCauses:
    """Decision.cause names the rule; a reload's words follow the direction of its change."""

    def test_first_map_swap_and_keep(self):
        cc = ChangeControl(loader())
        snr = profile()
        assert cc.decide(tracked(snr), 0.0).cause == "first_map"
        assert cc.decide(tracked(snr), 0.01).cause == "keep"
        snr2 = snr.copy()
        snr2[37] -= 10.0
        d = cc.decide(tracked(snr2), 1.0)
        assert (d.kind, d.cause) == (DecisionKind.BIT_SWAP, "tones_low")

    def test_a_swap_that_would_lose_too_much_is_a_reload_naming_the_loss(self):
        cc = ChangeControl(loader(), swap_max_loss_bits=0)
        snr = profile()
        cc.decide(tracked(snr), 0.0)
        snr2 = snr.copy()
        snr2[37] -= 10.0
        d = cc.decide(tracked(snr2), 1.0)
        assert (d.kind, d.cause) == (DecisionKind.RELOAD, "swap_loss")
        assert "(> swap_max_loss_bits 0)" in d.reason

    def test_swaps_off_is_named(self):
        cc = ChangeControl(loader(), swap_max_tones=0)
        snr = profile()
        cc.decide(tracked(snr), 0.0)
        snr2 = snr.copy()
        snr2[37] -= 10.0
        d = cc.decide(tracked(snr2), 1.0)
        assert (d.kind, d.cause) == (DecisionKind.RELOAD, "swap_tones")

    def test_emergency_and_upgrade_causes(self):
        cc = ChangeControl(loader(), up_dwell_s=0.5, upgrade_check_s=0.1)
        snr = profile()
        cc.decide(tracked(snr), 0.0)
        d = cc.decide(tracked(snr - 12.0), 1.0)
        assert (d.kind, d.cause) == (DecisionKind.EMERGENCY, "emergency_tones")
        ups = [cc.decide(tracked(snr), 1.0 + 0.05 * k) for k in range(1, 40)]
        assert [d.cause for d in ups if d.kind is not DecisionKind.KEEP][:1] == ["upgrade"]

    def test_a_reload_with_more_bits_reads_as_a_gain(self):
        """Loaded tones fall together by 1.4 dB while 20 unloaded tones come back by 30 dB:
        the common-mode rule calls for the reload, and it carries more bits than before."""
        cc = ChangeControl(loader())
        snr = profile()
        snr[40:60] = -10.0          # a deep fade: these tones carry nothing
        first = cc.decide(tracked(snr), 0.0).allocation
        assert (first.bits[40:60] == 0).all()
        back = profile() - 1.4
        out = [cc.decide(tracked(back), 1.0 + 0.01 * k) for k in range(30)]
        made = [d for d in out if d.kind is not DecisionKind.KEEP]
        assert made and made[0].cause == "common_mode"
        gain = made[0].allocation.total_bits - first.total_bits
        assert gain > 0
        assert made[0].reason.startswith(f"reload: {gain:+d} bits (")
        assert "made for: band fell" in made[0].reason

    def test_a_forced_map_names_its_kind(self):
        cc = ChangeControl(loader())
        cc.decide(tracked(profile()), 0.0)
        fb = cc.current
        assert cc.force(fb, "fallback", "stale", 1.0).cause == "fallback"
        assert cc.decide(tracked(profile()), 2.0).cause == "after_fallback"
