"""Structure checks of the shared records."""

import numpy as np
import pytest

from brimline.daemon.records import Allocation, Decision, DecisionKind, Estimate, LoadMap, TonePlan


def _plan():
    data = [t for t in range(-26, 27) if t not in (0, -21, -7, 7, 21)]
    return TonePlan(64, 16, 20e6, data, [-21, -7, 7, 21])


class TestTonePlan:
    def test_ieee_80211a_numerology(self):
        """IEEE 802.11a-1999 clause 17: 64-point FFT at 20 MHz gives 312.5 kHz spacing,
        52 used tones with 4 pilots at -21, -7, 7, 21, DC empty, 16-sample CP (4.0 us symbol)."""
        plan = _plan()
        assert plan.tone_spacing_hz == 312.5e3
        assert plan.data_tones.size == 48
        assert plan.null_tones.size == 64 - 52
        assert 0 in plan.null_tones
        assert plan.symbol_len / plan.sample_rate_hz == pytest.approx(4.0e-6)

    def test_plan_id_is_stable_and_distinguishes(self):
        assert _plan().plan_id == _plan().plan_id
        other = TonePlan(64, 8, 20e6, _plan().data_tones, [-21, -7, 7, 21])
        assert other.plan_id != _plan().plan_id

    @pytest.mark.parametrize("kwargs, match", [
        (dict(fft_size=60), "power of two"),
        (dict(cp_len=64), "cp_len"),
        (dict(pilot_tones=[1]), "both data and pilot"),
        (dict(data_tones=[40]), "must lie in"),
    ])
    def test_bad_plans(self, kwargs, match):
        base = dict(fft_size=64, cp_len=16, sample_rate_hz=20e6,
                    data_tones=[1, 2, 3], pilot_tones=[5])
        base.update(kwargs)
        with pytest.raises(ValueError, match=match):
            TonePlan(**base)


def test_estimate_arrays_are_read_only_and_typed():
    est = Estimate(frame=1, time_s=0.5, plan_id="x", tone_index=[1, 2],
                   channel=[1 + 1j, 1], noise_var=[0.1, 0.1], snr_db=[10, 10])
    assert est.channel.dtype == np.complex64 and est.snr_db.dtype == np.float32
    with pytest.raises(ValueError):
        est.snr_db[0] = 3.0
    with pytest.raises(ValueError, match="tone_index has 2"):
        Estimate(frame=1, time_s=0, plan_id="x", tone_index=[1, 2], channel=[1],
                 noise_var=[1, 1], snr_db=[1, 1])


def test_loadmap_and_decision():
    m = LoadMap(epoch="e", seq=3, effective_frame=10, created_s=1.0, plan_id="p",
                tone_index=[1, 2], bits=[2, 4], power_lin=[1, 1], total_bits=6,
                margin_db=3.0, gap_db=9.8)
    assert m.bits.dtype == np.uint8
    alloc = Allocation(bits=[2, 4], power=[1.0, 1.0], total_bits=6, total_power=2.0, margin_db=3)
    assert Decision(DecisionKind.RELOAD, "x", alloc).kind is DecisionKind.RELOAD
    with pytest.raises(ValueError, match="exactly when"):
        Decision("keep", "steady", alloc)
