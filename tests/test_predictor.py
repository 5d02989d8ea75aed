"""Tests of the per-tone channel predictor (brimline.daemon.core.predictor)."""

from __future__ import annotations

import hashlib
import math

import numpy as np
import pytest
from scipy.special import j0

from brimline.daemon.core.estimator import Estimator
from brimline.daemon.core.predictor import ChannelPredictor, align_phase, common_rotation
from brimline.daemon.records import Estimate

FPS = 50.0


def clarke_tones(n_tones: int, n_frames: int, doppler_hz: float, rng, n_sin: int = 64):
    """Rayleigh fading per tone, independent between tones, by Clarke's sum of sinusoids
    (random arrival angles and phases, unit mean power), sampled at ``FPS``."""
    t = np.arange(n_frames) / FPS
    freq = doppler_hz * np.cos(rng.uniform(0, 2 * np.pi, (n_tones, n_sin)))
    phase = rng.uniform(0, 2 * np.pi, (n_tones, n_sin))
    arg = 2 * np.pi * freq[:, :, None] * t[None, None, :] + phase[:, :, None]
    return (np.exp(1j * arg).sum(axis=1) / math.sqrt(n_sin)).T   # (frames, tones)


class TestClarkeFading:
    def test_hold_error_matches_clarke_autocorrelation(self, rng):
        """The generator itself: E|H(t + tau) - H(t)|**2 = 2 (1 - J0(2 pi fd tau)) for unit
        power (Clarke's model, Jakes, "Microwave Mobile Communications", 1974, eq. 1.3-20
        from memory; J0 from scipy)."""
        h = clarke_tones(400, 200, 1.0, rng)
        lag = 5
        measured = np.mean(np.abs(h[lag:] - h[:-lag]) ** 2)
        assert measured == pytest.approx(2 * (1 - j0(2 * np.pi * 1.0 * lag / FPS)), rel=0.15)

    def test_prediction_beats_hold_over_the_horizon(self, rng):
        """Over 2..6 frames ahead at 1 Hz Doppler and 50 frames/s (2 pi fd tau up to 0.75,
        where Clarke's J0 autocorrelation makes the held value's error 27 % of the power),
        the line predicts the magnitude with less error than holding the last value."""
        h = clarke_tones(200, 160, 1.0, rng)
        noisy = h + 0.02 * (rng.standard_normal(h.shape) + 1j * rng.standard_normal(h.shape))
        p = ChannelPredictor(horizon_s=0.12)
        tones = np.arange(200) - 100
        err_pred = {k: [] for k in range(2, 7)}
        err_hold = {k: [] for k in range(2, 7)}
        for i in range(150):
            p.update(i / FPS, noisy[i], tones)
            if i < 10:
                continue
            for k in err_pred:
                if i + k < h.shape[0]:
                    future = np.abs(h[i + k])
                    err_pred[k].append(np.mean((np.abs(p.predict(k / FPS)) - future) ** 2))
                    err_hold[k].append(np.mean((np.abs(noisy[i]) - future) ** 2))
        for k in err_pred:
            assert np.mean(err_pred[k]) < 0.6 * np.mean(err_hold[k]), k


class TestStatic:
    def test_static_channel_predicts_the_held_value(self, rng):
        """A channel that does not move is predicted as itself, with no allowance and no
        predicted fall, even when the receiver's phase reference and timing jump each frame."""
        n = 64
        tones = np.arange(n) - n // 2
        tones = tones[tones != 0]
        h = rng.standard_normal(tones.size) + 1j * rng.standard_normal(tones.size)
        p = ChannelPredictor(horizon_s=0.12)
        for i in range(20):
            turn = np.exp(1j * (rng.uniform(-np.pi, np.pi) + rng.uniform(-0.05, 0.05) * tones))
            p.update(i / FPS, h * turn, tones)
        assert np.allclose(np.abs(p.predict(0.1)), np.abs(h), rtol=1e-9)
        assert np.allclose(p.allowance(), 0.0, atol=1e-9)
        assert np.allclose(p.fall_db(np.ones(tones.size)), 0.0, atol=1e-9)

    def test_off_and_before_two_estimates(self):
        p = ChannelPredictor(horizon_s=0.0)
        p.update(0.0, np.ones(4), np.arange(4))
        p.update(0.02, np.ones(4), np.arange(4))
        assert p.fall_db(np.ones(4)) is None
        q = ChannelPredictor(horizon_s=0.1)
        assert q.predict(0.1) is None
        q.update(0.0, np.ones(4), np.arange(4))
        assert q.fall_db(np.ones(4)) is None

    def test_limits(self):
        with pytest.raises(ValueError, match=r"predictor\.window=1 must be"):
            ChannelPredictor(window=1)


class TestAlignment:
    def test_common_rotation(self, rng):
        h = rng.standard_normal(50) + 1j * rng.standard_normal(50)
        assert common_rotation(h * np.exp(0.7j), h) == pytest.approx(0.7)
        assert common_rotation(np.zeros(3), np.zeros(3)) == 0.0

    def test_ramp_and_phase_removed(self, rng):
        """A timing step of d samples turns bin k by 2 pi d k / N (the DFT shift theorem)."""
        bins = np.arange(-100, 101)
        bins = bins[bins != 0]
        h = rng.standard_normal(bins.size) + 1j * rng.standard_normal(bins.size)
        shifted = h * np.exp(1j * (1.1 + 2 * np.pi * 0.37 * bins / 256))
        assert np.allclose(align_phase(shifted, h, bins), h, atol=1e-3)


class TestEstimatorPrediction:
    def _frames(self, channel, rng, n=40):
        tones = np.arange(channel.shape[1]) - channel.shape[1] // 2
        for i in range(n):
            h = channel[min(i, channel.shape[0] - 1)]
            nv = np.full(h.size, 0.01)
            yield Estimate(frame=i, time_s=i / FPS, plan_id="p", tone_index=tones, channel=h,
                           noise_var=nv, snr_db=10 * np.log10(np.abs(h) ** 2 / nv))

    def test_static_channel_same_as_without_prediction(self, rng):
        h = np.tile(rng.standard_normal(32) + 1j * rng.standard_normal(32) + 2.0, (1, 1))
        on, off = Estimator(predict_s=0.12), Estimator(predict_s=0.0)
        for e in self._frames(h, rng):
            on.update(e, e.time_s)
            off.update(e, e.time_s)
        assert np.allclose(on.tracked(1.0).effective_snr_db, off.tracked(1.0).effective_snr_db)

    def test_fading_tone_predicted_to_fall_is_lowered(self, rng):
        """A tone whose channel moves steadily towards zero (a notch arriving) is loaded for
        where it will be, not where it is."""
        n = 16
        t = np.arange(40)[:, None] / FPS
        h = np.ones((40, n), dtype=complex) * 2.0
        h[:, 3] = 2.0 - 6.0 * t[:, 0]               # reaches 0 at 0.33 s
        on, off = Estimator(predict_s=0.12), Estimator(predict_s=0.0)
        for e in self._frames(h, rng, n=12):
            on.update(e, e.time_s)
            off.update(e, e.time_s)
        fall = on.tracked(1.0).effective_snr_db - off.tracked(1.0).effective_snr_db
        assert fall[3] < -3.0
        assert np.all(np.abs(np.delete(fall, 3)) < 0.5)


# The digest of predictor_digest() as the first version of the predictor computed it (x86-64
# Linux, numpy 2.4). Speed work on the predictor must leave it as it is; a change of method
# re-pins it and says why. Like the offline digests, a platform whose exp, log10 or FFT rounds
# differently in the last place could move it without any change of code.
PREDICTOR_DIGEST = "61c3c29c2948a92e0dc0a18e2bce7b20c85b4dc45fd34e5eb8a7d95a601f4584"


def predictor_digest() -> str:
    """SHA-256 of everything a predictor hands out over a seeded run that wraps its buffers,
    restarts tones, grows its horizon count, and is reset (invented data)."""
    rng = np.random.default_rng(20261203)
    n = 90
    tones = np.sort(rng.choice(np.arange(-150, 150), n, replace=False))
    noise_var = np.full(n, 1e-3)
    out = hashlib.sha256()
    for horizon_s, frame_s in ((0.12, 0.02), (0.3, 0.005)):
        p = ChannelPredictor(horizon_s=horizon_s, window=4, allowance_sigmas=0.5, pool_tones=2)
        h = rng.standard_normal(n) + 1j * rng.standard_normal(n)
        for k in range(80):
            h = h * np.exp(0.05j * rng.standard_normal(n)) + 0.02 * (
                rng.standard_normal(n) + 1j * rng.standard_normal(n))
            turn = np.exp(1j * (rng.uniform(-3, 3) + rng.uniform(-0.03, 0.03) * tones))
            p.update(k * frame_s, h * turn, tones)
            if k % 9 == 4:
                p.restart(rng.random(n) < 0.3)
            if k == 50:
                p.reset()
            for arr in (p.change_db(p.frame_interval_s, noise_var), p.fall_db(noise_var),
                        p.allowance(), p.predict(0.01)):
                out.update(b"-" if arr is None else np.ascontiguousarray(arr).tobytes())
    return out.hexdigest()


def test_outputs_pinned_bit_for_bit():
    """Ring buffers, scoring all horizons at once and the per-plan phase search compute
    exactly what one line and one horizon at a time did."""
    assert predictor_digest() == PREDICTOR_DIGEST
