"""The sample clock offset fit (drivers/link/clock.py).

Reference for the positions: a clock running fast by e ppm counts (1 + e 1e-6) of its samples
in the time the transmitter counts one (the definition of a frequency offset in ppm); the
synthetic starts below are built from that definition, with jitter from a seeded generator. The
least-squares slope is checked against numpy.polyfit, an independent implementation.
"""

from __future__ import annotations

import numpy as np
import pytest

from brimline.drivers.link.clock import MAX_OFFSET_PPM, ClockFit, clock_offset_ppm

SLOT = 19200.0  # 480 kS/s at 25 frames per second (the rehearsal's link)


def starts(counters, ppm, rng, jitter_samples=1.0, origin=1234.0):
    k = np.asarray(counters, dtype=np.float64)
    return origin + k * SLOT * (1.0 + ppm * 1e-6) + rng.normal(0.0, jitter_samples, k.size)


class TestClockOffsetPpm:
    def test_known_offset_with_jitter_is_recovered(self, rng):
        k = np.arange(64)
        got = clock_offset_ppm(starts(k, 50.0, rng), k, SLOT)
        # jitter 1 sample over 63 slots of 19200: slope error ~ 1/(19200*sqrt(64*63^2/12)) ~ 0.3 ppm
        assert got == pytest.approx(50.0, abs=2.0)

    def test_matches_numpy_polyfit(self, rng):
        k = np.arange(5, 40)
        p = starts(k, -120.0, rng, jitter_samples=3.0)
        slope = np.polyfit(k * SLOT, p, 1)[0]
        assert clock_offset_ppm(p, k, SLOT) == pytest.approx((slope - 1) * 1e6, abs=1e-6)

    def test_gap_in_counters_is_only_fewer_points(self, rng):
        k = np.r_[0:10, 25:40]  # 15 frames lost to noise in between
        assert clock_offset_ppm(starts(k, 20.0, rng), k, SLOT) == pytest.approx(20.0, abs=2.0)

    def test_one_frame_found_off_does_not_tilt_the_robust_fit(self):
        """The first frame of a stream found 9 samples late (as the synchroniser finds it at
        the very start of a stream): plain least squares tilts (by about 1.7 ppm here), the
        fit over the inliers of the Theil-Sen line does not."""
        k = np.arange(40)
        p = 100.0 + k * SLOT * (1 + 30e-6)
        p[0] += 9.0
        assert abs(clock_offset_ppm(p, k, SLOT) - 30.0) > 1.0
        assert clock_offset_ppm(p, k, SLOT, inlier_samples=3.0) == pytest.approx(30.0,
                                                                                 abs=1e-6)

    def test_robust_fit_matches_scipy_theilslopes_and_numpy_polyfit(self, rng):
        """A quarter of the frames 40 samples off: the inliers of scipy.stats.theilslopes'
        line (independent implementation of Theil-Sen), fitted by numpy.polyfit, give the
        same offset."""
        stats = pytest.importorskip("scipy.stats")
        k = np.arange(48)
        p = starts(k, 75.0, rng)
        p[rng.choice(k.size, 12, replace=False)] += 40.0
        x = k * SLOT
        slope, intercept = stats.theilslopes(p, x)[:2]
        inl = np.abs(p - np.median(p - slope * x) - slope * x) <= 5.0
        assert inl.sum() == 36
        expected = (np.polyfit(x[inl], p[inl], 1)[0] - 1) * 1e6
        assert clock_offset_ppm(p, k, SLOT, inlier_samples=5.0) == pytest.approx(expected,
                                                                                 abs=1e-6)
        assert expected == pytest.approx(75.0, abs=3.0)

    @pytest.mark.parametrize("p,k,slot", [
        ([], [], SLOT), ([1.0], [3], SLOT), ([1.0, 2.0], [3, 3], SLOT),
        ([1.0, np.nan], [0, 1], SLOT), ([1.0, 2.0], [0, 1], 0.0), ([1.0, 2.0], [0, 1], np.nan),
        ([1.0, 2.0, 3.0], [0, 1], SLOT)])
    def test_degenerate_input_gives_none(self, p, k, slot):
        assert clock_offset_ppm(p, k, slot) is None


class TestClockFit:
    def test_none_until_enough_frames_then_the_offset(self, rng):
        fit = ClockFit(SLOT, min_frames=8)
        k = np.arange(40)
        p = starts(k, 50.0, rng)
        for i in range(7):
            fit.add(p[i], k[i])
            assert fit.offset_ppm is None
        for i in range(7, 40):
            fit.add(p[i], k[i])
        assert fit.offset_ppm == pytest.approx(50.0, abs=3.0)
        assert fit.restarts == 0

    def test_lost_frames_keep_the_fit(self, rng):
        fit = ClockFit(SLOT)
        k = np.r_[0:20, 31:50]
        for pos, c in zip(starts(k, -30.0, rng), k):
            fit.add(pos, c)
        assert fit.restarts == 0
        assert fit.offset_ppm == pytest.approx(-30.0, abs=3.0)

    def test_lost_samples_restart_the_fit(self, rng):
        """Half a buffer of samples lost between frames 19 and 20 (an overflow nobody
        reported): the starts after it are off the line, and the fit starts again there."""
        fit = ClockFit(SLOT, window=32)
        k = np.arange(60)
        p = starts(k, 50.0, rng)
        p[20:] -= 3000.0
        for i in range(20):
            fit.add(p[i], k[i])
        fit.add(p[20], k[20])
        assert fit.restarts == 1 and fit.offset_ppm is None
        for i in range(21, 60):
            fit.add(p[i], k[i])
        assert fit.restarts == 1
        assert fit.offset_ppm == pytest.approx(50.0, abs=3.0)

    def test_restart_forgets_the_stretch(self, rng):
        fit = ClockFit(SLOT)
        k = np.arange(20)
        for pos, c in zip(starts(k, 50.0, rng), k):
            fit.add(pos, c)
        assert fit.offset_ppm is not None
        fit.restart()  # a reconnect: a new stream, positions from 0 again
        assert fit.offset_ppm is None and fit.restarts == 1
        k2 = np.arange(500, 520)
        for pos, c in zip(starts(k2 - 500, -10.0, rng, origin=77.0), k2):
            fit.add(pos, c)
        assert fit.offset_ppm == pytest.approx(-10.0, abs=4.0)

    def test_repeated_or_backward_counter_restarts(self, rng):
        fit = ClockFit(SLOT, min_frames=3)
        for pos, c in zip(starts([0, 1, 2, 3], 0.0, rng), [0, 1, 2, 3]):
            fit.add(pos, c)
        fit.add(4 * SLOT + 1234.0, 3)
        assert fit.restarts == 1 and fit.offset_ppm is None

    def test_wrong_slot_length_shows_nothing(self, rng):
        """The transmitter runs 25 frames per second; told 50 (half the slot), every frame looks
        like lost samples, and no offset is given rather than a wrong one."""
        fit = ClockFit(SLOT / 2)
        k = np.arange(40)
        for pos, c in zip(starts(k, 0.0, rng), k):
            fit.add(pos, c)
        assert fit.offset_ppm is None

    def test_offset_beyond_the_plausible_is_none(self):
        fit = ClockFit(SLOT, min_frames=2, tolerance_samples=1e9)
        ppm = 3 * MAX_OFFSET_PPM
        for c in range(10):
            fit.add(c * SLOT * (1 + ppm * 1e-6), c)
        assert fit.offset_ppm is None

    def test_non_finite_position_is_ignored(self, rng):
        fit = ClockFit(SLOT, min_frames=3)
        fit.add(float("nan"), 0)
        fit.add(float("inf"), 1)
        assert fit.offset_ppm is None and fit.restarts == 0

    @pytest.mark.parametrize("kw,msg", [
        (dict(slot_samples=0.0), r"slot_samples=0.0 must be a positive number"),
        (dict(slot_samples=SLOT, min_frames=1), r"min_frames=1 must be >= 2"),
        (dict(slot_samples=SLOT, min_frames=10, window=5), r"<= window=5"),
        (dict(slot_samples=SLOT, refit_every=0), r"refit_every=0 must be >= 1"),
    ])
    def test_bad_settings(self, kw, msg):
        with pytest.raises(ValueError, match=msg):
            ClockFit(**kw)
