"""Loading engine: water-filling and discrete loading, checked from outside (QAM theory: test_qam).

Every external check names its source next to it. "Computed" values are recomputed here from the
stated formula with scipy rather than pasted; "common practice" marks a value of the trade;
"from memory" marks a formula or number not confirmed against a copy of the source.
"""

from __future__ import annotations

import itertools
import math
from concurrent.futures import ThreadPoolExecutor

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import optimize

from brimline.daemon.core import loading
from brimline.daemon.core.loading import (
    Loader,
    _greedy_oracle,
    _water_level,
    allowed_bits,
    load_margin,
    load_rate,
    uniform_margin_db,
    waterfill,
)
from brimline.daemon.core.qam import qam_gap_db
from brimline.daemon.errors import InfeasibleError, InputError
from brimline.daemon.runtime.config import LoadingSection


def db(x):
    return 10.0 * np.log10(x)


def lin(x_db):
    return 10.0 ** (np.asarray(x_db, dtype=float) / 10.0)


def frequency_selective(rng, n, mean_db=25.0):
    """Invented test channel: three-path response plus scatter, linear SNR (N,)."""
    k = np.arange(n)
    taps = rng.normal(size=3) + 1j * rng.normal(size=3)
    delays = np.array([0.0, 2.7, 6.1])
    h = (taps * np.exp(-2j * np.pi * np.outer(k, delays) / n)).sum(axis=1)
    h /= np.sqrt(np.mean(np.abs(h) ** 2))
    return lin(mean_db + 20 * np.log10(np.abs(h) + 1e-3) + rng.normal(0, 1, n))


# --------------------------------------------------------------------------- water-filling


class TestWaterfill:
    def test_small_textbook_case(self):
        """Noise levels 1, 2, 4 with P = 3: level 3, powers 2, 1, 0 (Cover and Thomas sec. 9.4
        water-filling, computed)."""
        wf = waterfill(1.0 / np.array([1.0, 2.0, 4.0]), budget_db=0.0)
        assert wf.water_level == pytest.approx(3.0)
        np.testing.assert_allclose(wf.power, [2.0, 1.0, 0.0], atol=1e-12)

    def test_goldsmith_example_4_7(self):
        """Goldsmith, Wireless Communications, Example 4.7: three 1 MHz subchannels with
        |H| = 1, 2, 3, P = 10 mW, N0 = 1e-9 W/Hz. Recomputed (the printed numbers were not
        seen): cutoff 2.6406, power fractions 0.2787 / 0.3537 / 0.3676, C = 10.93 Mbit/s.
        Nominal per-tone power is P/3, so the SNR at nominal is gamma_i / 3."""
        gamma_full = np.array([1.0, 4.0, 9.0]) * 10e-3 / (1e-9 * 1e6)  # SNR with all of P
        cutoff = 3.0 / (1.0 + np.sum(1.0 / gamma_full))  # eq. 4.26 with sum of powers = P
        assert cutoff == pytest.approx(2.6406, abs=5e-5)
        wf = waterfill(gamma_full / 3.0)
        np.testing.assert_allclose(wf.power / 3.0, [0.2787, 0.3537, 0.3676], atol=5e-5)
        np.testing.assert_allclose(wf.power / 3.0, 1 / cutoff - 1 / gamma_full, rtol=1e-12)
        assert wf.capacity_bits * 1e6 == pytest.approx(10.93e6, rel=5e-4)

    def _scipy_reference(self, snr, gap, budget, cap):
        """Independent check: scipy.optimize.minimize (SLSQP) on the same concave program."""
        n = snr.size
        res = optimize.minimize(
            lambda p: -np.sum(np.log2(1 + p * snr / gap)),
            np.full(n, budget / n),
            jac=lambda p: -(snr / gap) / (1 + p * snr / gap) / math.log(2),
            bounds=[(0, cap)] * n,
            constraints=[{"type": "ineq", "fun": lambda p: budget - p.sum(),
                          "jac": lambda p: -np.ones(n)}],
            method="SLSQP", options={"ftol": 1e-14, "maxiter": 500})
        assert res.success
        return res.x, -res.fun

    @pytest.mark.parametrize("cap_db", [math.inf, 1.5])
    def test_against_general_solver(self, rng, cap_db):
        snr = lin(rng.uniform(-5, 25, 12))
        wf = waterfill(snr, gap_db=6.0, budget_db=0.0, cap_db=cap_db)
        p_ref, c_ref = self._scipy_reference(snr, lin(6.0), 12.0, lin(cap_db))
        assert wf.capacity_bits == pytest.approx(c_ref, rel=1e-7)
        np.testing.assert_allclose(wf.power, p_ref, atol=1e-4)
        assert wf.power.sum() == pytest.approx(12.0)
        assert wf.power.max() <= lin(cap_db) * (1 + 1e-12)

    def test_caps_hold_less_than_the_budget(self):
        wf = waterfill(np.array([1.0, 10.0, 0.0]), budget_db=10.0, cap_db=0.0)
        np.testing.assert_allclose(wf.power, [1.0, 1.0, 0.0])
        assert wf.water_level == pytest.approx(1.0 + 1.0)  # lowest level filling both: 1/1 + 1

    def test_all_zero_snr(self):
        wf = waterfill(np.zeros(4))
        assert math.isnan(wf.water_level) and wf.capacity_bits == 0 and not wf.power.any()

    def test_private_level_search_plateau(self):
        """Budget exactly at a plateau of the capped total: the plateau's start is returned."""
        # floors 1 and 5, cap 1: total rises to 1 at mu = 2, stays 1 until mu = 5.
        assert _water_level(np.array([1.0, 5.0]), 1.0, 1.0) == pytest.approx(2.0)
        assert _water_level(np.array([1.0, 5.0]), 1.5, 1.0) == pytest.approx(5.5)


# --------------------------------------------------------------------------- discrete loading


def exhaustive_rate(snr, bits, gap_db, budget_db, cap_db):
    """Independent oracle: every combination of allowed bits; the most bits that fit."""
    gap, cap = lin(gap_db), lin(cap_db)
    budget = snr.size * lin(budget_db)
    best = 0
    for combo in itertools.product(bits, repeat=snr.size):
        b = np.array(combo)
        with np.errstate(divide="ignore", invalid="ignore"):
            p = np.where(b > 0, gap * (2.0 ** b - 1) / snr, 0.0)
        if p.sum() <= budget and p.max() <= cap and b.sum() > best:
            best = b.sum()
    return best


def exhaustive_margin(snr, bits, target, gap_db, budget_db, cap_db):
    """Independent oracle: least required power over combinations with exactly ``target`` bits."""
    gap, cap = lin(gap_db), lin(cap_db)
    best = math.inf
    for combo in itertools.product(bits, repeat=snr.size):
        b = np.array(combo)
        if b.sum() != target:
            continue
        with np.errstate(divide="ignore", invalid="ignore"):
            p = np.where(b > 0, gap * (2.0 ** b - 1) / snr, 0.0)
        if p.max() <= cap:
            best = min(best, p.sum())
    return best


def random_instance(rng, n):
    snr = lin(rng.uniform(-5, 30, n))
    if rng.random() < 0.2:
        snr[rng.integers(n)] = 0.0
    budget_db = float(rng.uniform(-8, 8))
    cap_db = float(rng.choice([math.inf, rng.uniform(-2, 8)]))
    return snr, budget_db, cap_db


HOLES = [0, 1, 2, 4, 6, 8]


class TestRate:
    def test_exhaustive_consecutive(self, rng):
        """Levin-Campello is exactly optimal for unit bit steps (Campello, ICC 1999); oracle:
        exhaustive search over every bit combination."""
        for _ in range(60):
            n = int(rng.integers(1, 5))
            snr, budget_db, cap_db = random_instance(rng, n)
            a = load_rate(snr, bits=range(7), gap_db=8.0, budget_db=budget_db, cap_db=cap_db)
            assert a.total_bits == exhaustive_rate(snr, range(7), 8.0, budget_db, cap_db)

    def test_exhaustive_holes_within_one_bit(self, rng):
        """With holes (steps of 2) the convex-hull solution is within max_step - 1 = 1 bit."""
        worse = 0
        for _ in range(60):
            n = int(rng.integers(1, 5))
            snr, budget_db, cap_db = random_instance(rng, n)
            a = load_rate(snr, bits=HOLES, gap_db=8.0, budget_db=budget_db, cap_db=cap_db)
            best = exhaustive_rate(snr, HOLES, 8.0, budget_db, cap_db)
            assert best - 1 <= a.total_bits <= best
            assert set(a.bits.tolist()) <= set(HOLES)
            worse += a.total_bits < best
        assert worse < 30  # mostly optimal, too

    def test_hughes_hartogs_on_larger_instances(self, rng):
        """Hughes-Hartogs greedy (one cheapest bit at a time; Cioffi's DMT notes ch. 4) reaches
        the same optimum: same total bits and the same (least) total power."""
        for n, budget_db, cap_db in [(256, 0.0, math.inf), (300, -3.0, 3.0), (64, 6.0, 1.0)]:
            snr = frequency_selective(rng, n)
            a = load_rate(snr, bits=range(11), gap_db=9.8, budget_db=budget_db, cap_db=cap_db)
            g = _greedy_oracle(snr, bits_max=10, gap_db=9.8, budget_db=budget_db, cap_db=cap_db)
            assert a.total_bits == g.sum()
            need = Loader(bits=range(11), gap_db=9.8).required_power(g, snr)
            assert a.total_power == pytest.approx(need.sum(), rel=1e-9)

    def test_hughes_hartogs_on_hard_channels(self, rng):
        """Rayleigh-deep notches and a 3 dB per-tone ceiling (most tones' tables truncated),
        bits 0..10, gap 9.8 dB (common-practice value): the same optimum as Hughes-Hartogs
        greedy (Cioffi's DMT notes ch. 4), both in total bits and in total power."""
        for n, budget_db in [(1024, 0.0), (512, -6.0), (700, 3.0)]:
            snr = rayleigh_notched(rng, n)
            a = load_rate(snr, bits=range(11), gap_db=9.8, budget_db=budget_db, cap_db=3.0)
            g = _greedy_oracle(snr, bits_max=10, gap_db=9.8, budget_db=budget_db, cap_db=3.0)
            assert a.total_bits == g.sum()
            need = Loader(bits=range(11), gap_db=9.8).required_power(g, snr)
            assert a.total_power == pytest.approx(need.sum(), rel=1e-9)
            assert a.power.max() <= lin(3.0)

    def test_exhaustive_notched_and_capped(self, rng):
        """Small instances with notches 20-40 dB deep next to strong tones and a tight ceiling,
        against exhaustive search over every bit combination."""
        for _ in range(40):
            n = int(rng.integers(2, 5))
            snr = lin(rng.uniform(20, 35, n))
            snr[rng.integers(n)] /= lin(rng.uniform(20, 40))
            cap_db = float(rng.uniform(0, 4))
            budget_db = float(rng.uniform(-4, 4))
            a = load_rate(snr, bits=range(7), gap_db=9.8, budget_db=budget_db, cap_db=cap_db)
            assert a.total_bits == exhaustive_rate(snr, range(7), 9.8, budget_db, cap_db)

    def test_efficient_and_e_tight(self, rng):
        """Campello's optimality conditions (ICC 1999): *efficient* (no bit moved from one tone
        to another lowers the power: the dearest last increment costs no more than the cheapest
        next one) and *E-tight* (no further increment fits the power left)."""
        for cap_db in (math.inf, 4.0):
            snr = frequency_selective(rng, 400)
            a = load_rate(snr, bits=range(11), gap_db=9.8, cap_db=cap_db)
            unit = lin(9.8) / snr
            last = np.where(a.bits > 0, unit * 2.0 ** (a.bits - 1), -np.inf)
            nxt_bits = a.bits + 1
            can_grow = (nxt_bits <= 10) & (unit * (2.0 ** nxt_bits - 1) <= lin(cap_db))
            nxt = np.where(can_grow, unit * 2.0 ** a.bits, np.inf)
            assert last.max() <= nxt.min() * (1 + 1e-12)
            assert nxt.min() > 400 - a.total_power

    def test_margin_is_the_headroom(self, rng):
        snr = frequency_selective(rng, 128)
        a = load_rate(snr, bits=range(9), gap_db=9.8, budget_db=0.0, cap_db=2.0)
        need = a.power
        expected = min(128 / need.sum(), lin(2.0) / need.max())
        assert a.margin_db == pytest.approx(db(expected))
        np.testing.assert_allclose(
            a.power, Loader(gap_db=9.8).required_power(a.bits, snr), rtol=1e-12)

    def test_constant_snr(self):
        """All tones equal: the bits differ by at most one between tones (ties split)."""
        a = load_rate(np.full(100, 1000.0), bits=range(16), gap_db=9.8)
        assert a.bits.max() - a.bits.min() <= 1
        b = a.bits.min()
        assert a.total_bits == exhaustive_like_constant(1000.0, 100, 9.8)
        assert b > 0

    def test_everything_fits_and_nothing_fits(self):
        a = load_rate(lin(np.full(8, 60.0)), bits=range(5), gap_db=9.8)
        assert (a.bits == 4).all()
        z = load_rate(np.zeros(5), bits=range(5), gap_db=9.8)
        assert z.total_bits == 0 and z.margin_db == math.inf and not z.power.any()

    def test_empty_frame(self):
        """No tones: an empty allocation with nothing loaded (it used to raise a math domain
        error from the threshold search's first guess)."""
        for bits in (range(11), HOLES):
            a = load_rate(np.array([]), bits=bits, gap_db=9.8, cap_db=3.0)
            assert a.bits.size == 0 and a.total_bits == 0 and a.margin_db == math.inf
        m = load_margin(np.array([]), target_bits=0, gap_db=9.8)
        assert m.bits.size == 0 and m.total_bits == 0

    def test_single_bit_set(self):
        a = load_rate(lin(np.full(4, 30.0)), bits=[0], gap_db=9.8)
        assert a.total_bits == 0


def rayleigh_notched(rng, n):
    """Invented channel: 24 Rayleigh taps with an exponential power-delay profile, so the
    per-tone power is exponentially distributed (deep notches); mean SNR 28 dB, 1 dB scatter."""
    profile = np.exp(-np.arange(24) / 6.0)
    g = (rng.normal(size=24) + 1j * rng.normal(size=24)) * np.sqrt(profile / profile.sum() / 2)
    power = np.abs(np.fft.fft(g, n)) ** 2
    return lin(28.0 + db(power + 1e-12) + rng.normal(0.0, 1.0, n))


def exhaustive_like_constant(snr, n, gap_db):
    """For equal tones the optimum takes the cheapest increments in rounds: count them."""
    gap = lin(gap_db)
    costs = sorted(gap * 2.0 ** b / snr for b in range(15) for _ in range(n))
    return int(np.searchsorted(np.cumsum(costs), n, side="right"))


class TestMargin:
    def test_exhaustive_consecutive(self, rng):
        """Least power for exactly the target bits, against exhaustive search; then the powers
        are scaled by the margin, which leaves the budget or a ceiling tight."""
        checked = 0
        for _ in range(60):
            n = int(rng.integers(1, 5))
            snr, budget_db, cap_db = random_instance(rng, n)
            most = exhaustive_rate(snr, range(7), 8.0, budget_db, cap_db)
            if most == 0:
                continue
            target = int(rng.integers(1, most + 1))
            a = load_margin(snr, target_bits=target, bits=range(7), gap_db=8.0,
                            budget_db=budget_db, cap_db=cap_db)
            assert a.total_bits == target
            need = Loader(bits=range(7), gap_db=8.0).required_power(a.bits, snr)
            assert need.sum() == pytest.approx(
                exhaustive_margin(snr, range(7), target, 8.0, budget_db, cap_db), rel=1e-9)
            budget = n * lin(budget_db)
            factor = lin(a.margin_db)
            np.testing.assert_allclose(a.power, need * factor, rtol=1e-12)
            tight = max(a.power.sum() / budget, a.power.max() / lin(cap_db))
            assert tight == pytest.approx(1.0, rel=1e-9)
            checked += 1
        assert checked > 30

    def test_exhaustive_holes(self, rng):
        """With holes: exactly the target bits, power never below the exhaustive optimum (and
        on these seeded instances equal to it); a refusal only where exhaustive search finds no
        allocation either (e.g. 3 bits on one usable tone of 0, 1, 2, 4, ...)."""
        optimal = tried = 0
        for _ in range(40):
            n = int(rng.integers(2, 5))
            snr, budget_db, cap_db = random_instance(rng, n)
            most = exhaustive_rate(snr, HOLES, 8.0, budget_db, cap_db)
            if most < 2:
                continue
            target = int(rng.integers(1, most))
            best = exhaustive_margin(snr, HOLES, target, 8.0, budget_db, cap_db)
            try:
                a = load_margin(snr, target_bits=target, bits=HOLES, gap_db=8.0,
                                budget_db=budget_db, cap_db=cap_db)
            except InfeasibleError:
                assert best > n * lin(budget_db)
                continue
            assert a.total_bits == target
            need = Loader(bits=HOLES, gap_db=8.0).required_power(a.bits, snr)
            assert need.sum() >= best * (1 - 1e-9)
            optimal += need.sum() <= best * (1 + 1e-9)
            tried += 1
        assert tried > 20 and optimal >= 0.9 * tried

    def test_infeasible_target_names_both_numbers(self):
        snr = lin(np.full(10, 20.0))
        most = load_rate(snr, bits=range(9), gap_db=9.8).total_bits
        with pytest.raises(InfeasibleError, match=rf"target_bits=500 .* the {most} bits"):
            load_margin(snr, target_bits=500, bits=range(9), gap_db=9.8)
        with pytest.raises(InfeasibleError, match=rf"target_bits={most + 1} .* {most} bits"):
            load_margin(snr, target_bits=most + 1, bits=range(9), gap_db=9.8)
        assert load_margin(snr, target_bits=most, bits=range(9), gap_db=9.8).total_bits == most

    def test_zero_target(self):
        a = load_margin(lin(np.full(4, 20.0)), target_bits=0, gap_db=9.8)
        assert a.total_bits == 0 and a.margin_db == math.inf


# --------------------------------------------------------------------------- the Loader object


class TestLoader:
    def test_required_power_and_tone_margin(self):
        ld = Loader(gap_db=10.0)
        snr = np.array([100.0, 10.0, 0.0, 5.0])
        bits = np.array([3, 1, 0, 0])
        np.testing.assert_allclose(ld.required_power(bits, snr), [0.7, 1.0, 0.0, 0.0])
        m = ld.tone_margin_db(bits, np.array([1.4, 1.0, 0.0, 0.0]), snr)
        assert m[0] == pytest.approx(db(2.0)) and m[1] == pytest.approx(0.0)
        assert m[2] == math.inf and m[3] == math.inf
        assert ld.required_power([1], [0.0])[0] == math.inf

    def test_reused_across_frames_matches_free_functions(self, rng):
        ld = Loader(mode="rate", bits=range(11), gap_db=9.8, budget_db=1.0, cap_db=3.0)
        for _ in range(5):
            snr = frequency_selective(rng, 200)
            a, b = ld(snr), load_rate(snr, bits=range(11), gap_db=9.8, budget_db=1.0,
                                      cap_db=3.0)
            np.testing.assert_array_equal(a.bits, b.bits)
            assert a.margin_db == b.margin_db

    def test_waterfill_mode_rounds_bits_down(self, rng):
        snr = frequency_selective(rng, 64)
        ld = Loader(mode="waterfill", bits=HOLES, gap_db=9.8)
        a = ld(snr)
        assert set(a.bits.tolist()) <= set(HOLES)
        loaded = a.bits > 0
        assert (ld.tone_margin_db(a.bits, a.power, snr)[loaded] >= -1e-9).all()
        assert a.total_power <= 64 * (1 + 1e-9)

    def test_config_section_builds_the_loader(self):
        """gap from target_ser, minus coding gain, plus margin (config contract)."""
        sec = LoadingSection(target_ser=1e-7, coding_gain_db=2.0, margin_db=3.0,
                             bits=[0, 2, 4, 6])
        ld = sec.loader()
        assert ld.gap_db == pytest.approx(qam_gap_db(1e-7) + 1.0)
        assert ld.bits.tolist() == [0, 2, 4, 6]
        assert LoadingSection(gap_db=5.0, margin_db=1.0).loader().gap_db == pytest.approx(6.0)

    @pytest.mark.parametrize("kwargs, match", [
        (dict(bits=[]), "bits"),
        (dict(bits=[1, 2]), "start at 0"),
        (dict(bits=[0, 2, 1]), "ascending"),
        (dict(bits=[0, 17]), "<= 16"),
        (dict(bits=[0, 1.5]), "integers"),
        (dict(gap_db=float("nan")), "gap_db=nan"),
        (dict(budget_db=float("inf")), "budget_db=inf"),
        (dict(cap_db=-math.inf), "cap_db=-inf"),
        (dict(mode="fast"), "mode='fast'"),
        (dict(mode="margin"), "target_bits is required"),
        (dict(target_bits=-1), "target_bits=-1"),
        (dict(target_bits=True), "target_bits=True"),
    ])
    def test_bad_parameters(self, kwargs, match):
        args = dict(gap_db=9.8) | kwargs
        with pytest.raises(InputError, match=match):
            Loader(**args)

    @pytest.mark.parametrize("snr, match", [
        ([1.0, float("nan")], r"snr\[1\]=nan"),
        ([float("inf")], r"snr\[0\]=inf"),
        ([1.0, -0.1], r"snr\[1\]=-0.1"),
        ([[1.0]], "1-D"),
        (["abc"], "array of numbers"),
    ])
    def test_bad_snr(self, snr, match):
        with pytest.raises(InputError, match=match):
            load_rate(snr, gap_db=9.8)
        with pytest.raises(InputError, match=match):
            waterfill(snr)


# --------------------------------------------------------------------------- properties

snr_lists = st.lists(st.floats(min_value=-20, max_value=45), min_size=1, max_size=40).map(
    lambda xs: lin(np.array(xs)))
bit_sets = st.sampled_from([list(range(9)), list(range(16)), HOLES, [0, 2, 4, 6, 8], [0, 1]])
caps = st.one_of(st.just(math.inf), st.floats(min_value=-3, max_value=10))


@settings(max_examples=150, deadline=None)
@given(snr=snr_lists, bits=bit_sets, budget_db=st.floats(-10, 10), cap_db=caps,
       gap_db=st.floats(0, 12))
def test_rate_invariants(snr, bits, budget_db, cap_db, gap_db):
    """Budget never exceeded, ceilings respected, zero-bit tones carry no power, and more budget
    never gives fewer bits."""
    a = load_rate(snr, bits=bits, gap_db=gap_db, budget_db=budget_db, cap_db=cap_db)
    budget = snr.size * lin(budget_db)
    assert a.total_power <= budget * (1 + 1e-9)
    assert (a.power <= lin(cap_db) * (1 + 1e-9)).all()
    assert (a.power[a.bits == 0] == 0).all()
    assert set(a.bits.tolist()) <= set(bits)
    assert a.margin_db >= -1e-9
    more = load_rate(snr, bits=bits, gap_db=gap_db, budget_db=budget_db + 1.0, cap_db=cap_db)
    assert more.total_bits >= a.total_bits


@settings(max_examples=100, deadline=None)
@given(snr=snr_lists, bits=st.sampled_from([list(range(9)), list(range(13))]),
       budget_db=st.floats(-6, 6), cap_db=caps, frac=st.floats(0, 1))
def test_margin_invariants(snr, bits, budget_db, cap_db, frac):
    """Exactly the target bits; after the uniform scaling the budget and ceilings still hold and
    one of them is tight."""
    most = load_rate(snr, bits=bits, gap_db=9.8, budget_db=budget_db, cap_db=cap_db).total_bits
    target = int(frac * most)
    a = load_margin(snr, target_bits=target, bits=bits, gap_db=9.8, budget_db=budget_db,
                    cap_db=cap_db)
    assert a.total_bits == target
    budget = snr.size * lin(budget_db)
    assert a.total_power <= budget * (1 + 1e-9)
    assert (a.power <= lin(cap_db) * (1 + 1e-9)).all()
    assert (a.power[a.bits == 0] == 0).all()
    if target:
        tight = max(a.total_power / budget, a.power.max() / lin(cap_db))
        assert tight == pytest.approx(1.0, rel=1e-9)


@settings(max_examples=80, deadline=None)
@given(snr=snr_lists, budget_db=st.floats(-10, 10), cap_db=caps, gap_db=st.floats(0, 10))
def test_waterfill_invariants(snr, budget_db, cap_db, gap_db):
    wf = waterfill(snr, gap_db=gap_db, budget_db=budget_db, cap_db=cap_db)
    budget = snr.size * lin(budget_db)
    cap = lin(cap_db)
    assert (wf.power >= 0).all() and (wf.power <= cap * (1 + 1e-9)).all()
    assert wf.power.sum() <= budget * (1 + 1e-9)
    active = snr > 0
    if active.any() and cap * active.sum() > budget:
        assert wf.power.sum() == pytest.approx(budget, rel=1e-9)
    assert (wf.power[~active] == 0).all()


class TestOneRule:
    """Rules the loader shares with the config, the plan command, change control and the
    transmitter's follower (each written once, here)."""

    @pytest.mark.parametrize("bits, ok", [
        (range(9), True), ([0, 1, 2, 4, 6, 8], True), ([0], True), ([0, 16], True),
        ([], False), ([1, 2], False), ([0, 2, 1], False), ([0, 0, 1], False), ([0, 17], False),
        ([0, 1.5], False), ([0, True], False)])
    def test_allowed_bits(self, bits, ok):
        if ok:
            assert allowed_bits(bits) == tuple(bits)
        else:
            with pytest.raises(InputError, match=r"^--bits="):
                allowed_bits(bits, key="--bits", error=InputError)

    @pytest.mark.parametrize("where", ["config", "plan", "follower"])
    def test_every_user_of_the_bit_rule_refuses_the_same_set(self, where):
        from protocol_helpers import wifi_like_plan

        from brimline.daemon.commands.plan import parse_bit_list
        from brimline.daemon.errors import ConfigError
        from brimline.daemon.net.follower import Follower
        from brimline.daemon.runtime.config import parse_section

        with pytest.raises((ValueError, InputError, ConfigError), match="start at 0"):
            if where == "config":
                parse_section(LoadingSection, {"bits": [1, 2]}, where="x.yaml", name="loading")
            elif where == "plan":
                parse_bit_list("1-2")
            else:
                Follower(plan=wifi_like_plan(), bits=[1, 2])

    def test_uniform_margin_worked_example(self):
        """By the definition of margin_db (module notes), worked by hand: required powers 1, 2,
        3 with budget 12 and ceiling 5 can grow by min(12 / 6, 5 / 3) = 5/3, i.e. 2.2185 dB."""
        need = np.array([1.0, 2.0, 0.0, 3.0])
        assert uniform_margin_db(need, 12.0, 5.0) == pytest.approx(10 * math.log10(5 / 3))
        assert uniform_margin_db(need, 12.0, math.inf) == pytest.approx(10 * math.log10(2))
        assert uniform_margin_db(np.zeros(3), 12.0, 5.0) == math.inf

    def test_allocation_margin_is_the_shared_one(self, rng):
        ld = Loader(bits=range(11), gap_db=9.8, cap_db=3.0)
        snr = frequency_selective(rng, 64)
        a = ld(snr)
        need = ld.required_power(a.bits, snr)
        assert a.margin_db == uniform_margin_db(need, 64.0, 10 ** 0.3)


def test_module_exports():
    for name in loading.__all__:
        assert hasattr(loading, name)


@st.composite
def hard_channels(draw):
    """Invented hard channels for the greedy comparison: per-tone SNR in dB, some tones notched
    20-60 dB deeper, some at SNR 0, and ties: tones copied exactly, or scaled by an exact power
    of two (their costs then meet one bit apart); or every tone a power of two, where every
    cost, sum and ceiling comparison is exact (gap 0 dB, ceiling 0 dB among the draws)."""
    n = draw(st.integers(1, 40))
    if draw(st.booleans()):
        snr = lin(np.array(draw(st.lists(st.floats(-10, 45), min_size=n, max_size=n))))
        notched = np.array(draw(st.lists(st.booleans(), min_size=n, max_size=n)))
        snr[notched] /= lin(draw(st.floats(20, 60)))
    else:
        snr = np.ldexp(1.0, np.array(draw(st.lists(st.integers(-6, 14), min_size=n,
                                                        max_size=n))))
    for i, j, k in draw(st.lists(st.tuples(st.integers(0, n - 1), st.integers(0, n - 1),
                                           st.integers(-3, 3)), max_size=6)):
        snr[i] = np.ldexp(snr[j], k)
    snr[draw(st.lists(st.integers(0, n - 1), max_size=3))] = 0.0
    return snr


@settings(max_examples=400, deadline=None)
@given(snr=hard_channels(), bits_max=st.sampled_from([1, 2, 6, 10, 15]),
       gap_db=st.one_of(st.sampled_from([0.0, 9.8]), st.floats(0, 12)),
       budget_db=st.one_of(st.just(0.0), st.floats(-10, 10)),
       cap_db=st.one_of(st.sampled_from([math.inf, 0.0, 3.0]), st.floats(-3, 10)))
def test_rate_equals_greedy_bit_for_bit(snr, bits_max, gap_db, budget_db, cap_db):
    """Consecutive bit sets: the same bits on every tone as Hughes-Hartogs greedy loading (one
    cheapest increment at a time; Cioffi's DMT notes ch. 4), which Levin-Campello's optimum
    equals (Campello, ICC 1999). Ties: equal costs go to the lower tone index, as the greedy's
    argmin does. Margin mode with the greedy's bit count as its target takes the same
    increments (the cheapest ones)."""
    bits = range(bits_max + 1)
    greedy = _greedy_oracle(snr, bits_max=bits_max, gap_db=gap_db, budget_db=budget_db,
                            cap_db=cap_db)
    a = load_rate(snr, bits=bits, gap_db=gap_db, budget_db=budget_db, cap_db=cap_db)
    np.testing.assert_array_equal(a.bits, greedy)
    m = load_margin(snr, target_bits=int(greedy.sum()), bits=bits, gap_db=gap_db,
                    budget_db=budget_db, cap_db=cap_db)
    np.testing.assert_array_equal(m.bits, greedy)


class TestPrivateSearches:
    """The hard searches, called directly."""

    def test_bracket_invariant_and_guess_independence(self, rng):
        """Whatever the starting guess, the bracket holds the budget with at most one step per
        tone inside it, and the final allocation is the same."""
        for bits in (range(11), HOLES):
            ld = Loader(bits=bits, gap_db=9.8, cap_db=6.0)
            snr = frequency_selective(rng, 500)
            budget = ld._budget(snr.size)
            tones = ld._tones(snr, budget)
            results = []
            for guess in (-60.0, -3.0, 0.0, 4.0, 60.0):
                n_lo, n_hi, spent = ld._bracket(
                    tones, lambda n: ld._energy_of(tones, n), budget, guess)
                assert spent == pytest.approx(ld._energy_of(tones, n_lo))
                assert spent <= budget < ld._energy_of(tones, n_hi)
                assert set(np.unique(n_hi - n_lo).tolist()) <= {0, 1}
                results.append(ld._rate_steps(tones, budget))
            for r in results[1:]:
                np.testing.assert_array_equal(r, results[0])

    def test_truncated_table_top_matches_a_binary_search(self, rng):
        """The ceiling's truncation of a consecutive set's table, read from the exponent, is the
        binary search over the table (including rooms exactly on a table entry)."""
        ld = Loader(bits=range(11), gap_db=9.8, cap_db=3.0)
        room = np.concatenate([lin(rng.uniform(-40, 40, 2000)), ld._energy,
                               np.nextafter(ld._energy, 0.0), np.nextafter(ld._energy, np.inf),
                               [0.0, 1e300]])
        expected = np.searchsorted(ld._energy, room, side="right") - 1
        np.testing.assert_array_equal(ld._unit_top(room, 10), expected)

    def test_ladder_tops_use_the_greedy_comparison(self, rng):
        """A tone's top is the largest b <= last with unit * (2**b - 1) <= limit, evaluated in
        floating point exactly as the greedy reference evaluates it, also for units that meet
        the limit exactly and one rounding step either side of that."""
        ld = Loader(bits=range(11), gap_db=0.0, cap_db=0.0)  # limit 1, unit = 1 / snr
        exact = 1.0 / (2.0 ** np.arange(1, 11) - 1.0)
        units = np.concatenate([lin(rng.uniform(-40, 5, 500)), exact,
                                np.nextafter(exact, 0.0), np.nextafter(exact, 1.0),
                                [1.0, 0.5, 1e-30]])
        snr = 1.0 / units
        ladder = ld._with_tops(ld._ladder(snr, snr.min(), snr.max(), ld._budget(snr.size)))
        unit = ladder.unit[:units.size]
        expected = np.array([max(b for b in range(11) if u * (2.0 ** b - 1.0) <= 1.0)
                             for u in unit])
        np.testing.assert_array_equal(ladder.top[:units.size], expected)

    def test_subnormal_costs_take_the_threshold_search(self):
        """SNR near the largest double with a negative gap makes gap/snr subnormal, where the
        exponent no longer tracks 2**k: the threshold search answers, with the greedy's bits."""
        snr = np.array([1.7e308, 1e300, 1e5, 30.0, 0.0])
        ld = Loader(bits=range(11), gap_db=-30.0)
        assert ld._ladder(snr, 0.0, snr.max(), ld._budget(snr.size)) is None
        np.testing.assert_array_equal(
            ld(snr).bits, _greedy_oracle(snr, bits_max=10, gap_db=-30.0))

    def test_one_loader_serves_many_threads(self, rng):
        """Work arrays are per thread: concurrent frames of different sizes give the same
        allocations as one after another."""
        ld = Loader(bits=range(11), gap_db=9.8, cap_db=3.0)
        frames = [rayleigh_notched(rng, int(n)) for n in rng.integers(50, 2000, 24)]
        alone = [ld(f).bits for f in frames]
        with ThreadPoolExecutor(4) as pool:
            together = list(pool.map(lambda f: ld(f).bits, frames * 4))
        for got, want in zip(together, alone * 4):
            np.testing.assert_array_equal(got, want)

    def test_free_functions_reuse_loaders_only_for_plain_settings(self):
        snr = lin(np.array([20.0, 25.0, 5.0]))
        assert load_rate(snr, bits=(0, 1, 2), gap_db=9.8).total_bits == \
            load_rate(snr, bits=[0, 1, 2], gap_db=9.8).total_bits
        with pytest.raises(InputError, match="bits"):  # True == 1: never served from the cache
            load_rate(snr, bits=(False, True), gap_db=9.8)

    def test_margin_steps_hit_the_target(self, rng):
        ld = Loader(bits=range(13), gap_db=9.8)
        snr = frequency_selective(rng, 300)
        tones = ld._tones(snr, ld._budget(snr.size))
        for target in (0, 1, 17, 1000, 2500):
            assert int(ld._margin_steps(tones, target).sum()) == target

    def test_loader_is_read_only(self):
        ld = Loader(gap_db=9.8)
        with pytest.raises(AttributeError, match="build a new Loader"):
            ld.gap_db = 3.0
        with pytest.raises(ValueError):
            ld.bits[0] = 1

    def test_db_settings_are_bounded(self):
        with pytest.raises(InputError, match=r"gap_db=1000.0 is beyond"):
            Loader(gap_db=1000.0)


def test_docstring_examples():
    """The examples in the module's docstrings run and print what they say."""
    import doctest

    result = doctest.testmod(loading, optionflags=doctest.NORMALIZE_WHITESPACE)
    assert result.attempted >= 3 and result.failed == 0
