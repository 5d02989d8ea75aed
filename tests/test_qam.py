"""QAM theory: the SNR gap and the exact error rates of QAM on AWGN, checked from outside.

Every external check names its source next to it. "Computed" values are recomputed here from the
stated formula with scipy rather than pasted; "common practice" marks a value of the trade;
"from memory" marks a formula or number not confirmed against a copy of the source.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import optimize, special, stats

from brimline.daemon.core import qam
from brimline.daemon.core.qam import grid_ser, qam_ber, qam_gap_db, qam_ser
from brimline.daemon.errors import InputError


def db(x):
    return 10.0 * np.log10(x)


def lin(x_db):
    return 10.0 ** (np.asarray(x_db, dtype=float) / 10.0)


# --------------------------------------------------------------------------- gap


class TestGap:
    def test_common_practice_value_at_1e7(self):
        """SNR gap of uncoded QAM at Pe = 1e-7 is "9.8 dB" (common practice, e.g. DSL loading);
        recomputed from Gamma = [Q^-1(Pe/Ne)]^2 / 3 with Ne = 2 (Cioffi's DMT notes ch. 1, form
        from memory) using scipy.stats.norm.isf as Q^-1."""
        expected = db(stats.norm.isf(1e-7 / 2) ** 2 / 3)
        assert qam_gap_db(1e-7) == pytest.approx(expected, abs=1e-9)
        assert qam_gap_db(1e-7) == pytest.approx(9.8, abs=0.05)  # common practice

    def test_other_points(self):
        """Computed with scipy (values listed in the project's CHECKS notes): Ne = 2 at 1e-6 gives
        9.02 dB, Ne = 1 at 1e-6 gives 8.77 dB (the "8.8 dB" often quoted, from memory)."""
        assert qam_gap_db(1e-6) == pytest.approx(db(stats.norm.isf(0.5e-6) ** 2 / 3), abs=1e-9)
        assert qam_gap_db(1e-6) == pytest.approx(9.02, abs=0.005)
        assert qam_gap_db(1e-6, neighbours=1) == pytest.approx(8.77, abs=0.005)

    def test_coding_gain_and_margin_add_in_db(self):
        base = qam_gap_db(1e-7)
        assert qam_gap_db(1e-7, coding_gain_db=3.5, margin_db=6.0) == pytest.approx(base + 2.5)

    def test_gap_matches_exact_qam_at_large_m(self):
        """Consistency with the exact SER (Proakis 5th ed. sec. 4.3): at SNR = Gamma (M - 1) a
        large square QAM errs at about Ne_2D/Ne * Pe, with 4 (1 - 1/sqrt(M)) neighbours per
        symbol in two dimensions against Ne = 2 per dimension."""
        pe = 1e-7
        gamma = lin(qam_gap_db(pe))
        m = 2 ** 12
        ser = qam_ser(12, gamma * (m - 1))
        assert ser == pytest.approx(2 * (1 - 1 / 64) * pe, rel=0.02)

    @pytest.mark.parametrize("bad", [0.0, 0.5, -1e-3, float("nan"), "x"])
    def test_bad_target(self, bad):
        with pytest.raises(InputError, match="target_ser"):
            qam_gap_db(bad)

    def test_bad_db(self):
        with pytest.raises(InputError, match="margin_db=nan"):
            qam_gap_db(1e-7, margin_db=float("nan"))


# --------------------------------------------------------------------------- error rates


def proakis_square_ser(m, es_n0):
    """Proakis, Digital Communications 5th ed., sec. 4.3, square M-QAM symbol error rate,
    1 - (1 - P)**2 written as P (2 - P) so that tiny rates do not cancel to 0."""
    p_sqrt = 2 * (1 - 1 / math.sqrt(m)) * stats.norm.sf(np.sqrt(3 * es_n0 / (m - 1)))
    return p_sqrt * (2 - p_sqrt)


def cho_yoon_square_ber(m, eb_n0):
    """Cho and Yoon, IEEE Trans. Commun. 50(7), 2002, exact Gray BER of square M-QAM (eqs. as
    remembered; confirmed here by the published-check value 1.7542e-3 for 16-QAM at 10 dB)."""
    sm = int(round(math.sqrt(m)))
    log_sm = int(round(math.log2(sm)))
    total = 0.0
    for k in range(1, log_sm + 1):
        acc = 0.0
        for i in range(int((1 - 2.0 ** -k) * sm)):
            w = (-1) ** math.floor(i * 2 ** (k - 1) / sm)
            c = 2 ** (k - 1) - math.floor(i * 2 ** (k - 1) / sm + 0.5)
            acc += w * c * special.erfc((2 * i + 1) * math.sqrt(3 * math.log2(m) * eb_n0
                                                                  / (2 * (m - 1))))
        total += acc / sm
    return total / log_sm


def simulate_qam(rng, bits_per_symbol, es_n0, n_symbols):
    """Seeded Monte Carlo: Gray-labelled rectangular QAM, AWGN, per-dimension slicing."""
    k_i = (bits_per_symbol + 1) // 2
    k_q = bits_per_symbol - k_i
    m_i, m_q = 2 ** k_i, 2 ** k_q
    d2_over_es = 12.0 / (m_i ** 2 + m_q ** 2 - 2)  # d**2 / Es of the grid
    sigma = math.sqrt(1.0 / (2 * es_n0 * d2_over_es))  # per dimension, in units of d
    li = rng.integers(0, m_i, n_symbols)
    lq = rng.integers(0, m_q, n_symbols)
    ri = np.clip(np.rint(li + sigma * rng.normal(size=n_symbols)), 0, m_i - 1).astype(int)
    rq = np.clip(np.rint(lq + sigma * rng.normal(size=n_symbols)), 0, m_q - 1).astype(int)
    ser = np.mean((ri != li) | (rq != lq))

    def gray(x):
        return x ^ (x >> 1)

    def popcount(x):
        return np.array([bin(int(v)).count("1") for v in x])

    errs = popcount(gray(ri) ^ gray(li)) + popcount(gray(rq) ^ gray(lq))
    return ser, errs.sum() / (n_symbols * bits_per_symbol)


class TestErrorRates:
    @pytest.mark.parametrize("b", [2, 4, 6, 8])
    def test_square_ser_matches_proakis(self, b):
        es_n0 = lin(np.linspace(0, 30, 13))
        np.testing.assert_allclose(qam_ser(b, es_n0), proakis_square_ser(2 ** b, es_n0),
                                   rtol=1e-12)

    def test_bpsk(self):
        """BPSK Pb = Q(sqrt(2 Eb/N0)): computed 7.8650e-2 at 0 dB and 3.8721e-6 at 10 dB."""
        assert qam_ser(1, 1.0) == pytest.approx(stats.norm.sf(math.sqrt(2)), rel=1e-12)
        assert qam_ber(1, 1.0) == pytest.approx(7.8650e-2, rel=1e-4)
        assert qam_ber(1, 10.0) == pytest.approx(3.8721e-6, rel=1e-4)

    def test_16qam_ber_published_value(self):
        """Exact 16-QAM Gray BER at Eb/N0 = 10 dB: 1.7542e-3 (Cho and Yoon closed form,
        computed)."""
        assert qam_ber(4, 4 * 10.0) == pytest.approx(1.7542e-3, rel=1e-4)

    @pytest.mark.parametrize("b", [2, 4, 6, 8])
    def test_ber_matches_cho_yoon(self, b):
        eb_n0 = lin(np.array([4.0, 10.0, 16.0, 20.0]))
        ours = qam_ber(b, eb_n0 * b)
        ref = [cho_yoon_square_ber(2 ** b, x) for x in eb_n0]
        np.testing.assert_allclose(ours, ref, rtol=1e-10)

    @pytest.mark.parametrize("b, ebno_db", [(4, 13.43), (6, 17.79), (8, 22.50)])
    def test_ebno_for_1e5(self, b, ebno_db):
        """Eb/N0 for BER 1e-5: 16-QAM 13.43, 64-QAM 17.79, 256-QAM 22.50 dB (computed from the
        exact Gray BER; the usual textbook curves, from memory, agree to 0.1 dB)."""
        root = optimize.brentq(lambda x: math.log(qam_ber(b, lin(x) * b) / 1e-5), 5, 30)
        assert root == pytest.approx(ebno_db, abs=0.01)

    @pytest.mark.parametrize("b, es_n0_db", [(4, 14.0), (3, 11.0), (5, 17.0)])
    def test_monte_carlo(self, b, es_n0_db):
        """Seeded Monte Carlo of Gray rectangular QAM with per-dimension slicing, 200k symbols;
        tolerance 4 standard deviations of the estimate."""
        rng = np.random.default_rng(7)
        n = 200_000
        ser_mc, ber_mc = simulate_qam(rng, b, lin(es_n0_db), n)
        ser, ber = float(qam_ser(b, lin(es_n0_db))), float(qam_ber(b, lin(es_n0_db)))
        assert abs(ser_mc - ser) < 4 * math.sqrt(ser / n)
        # a symbol's bit-error fraction lies in [0, 1], so its variance is at most its mean
        assert abs(ber_mc - ber) < 4 * math.sqrt(ber / n)

    @pytest.mark.parametrize("b", [4, 6])
    def test_cell_integration_reproduces_square_qam(self, b):
        """The cell-by-cell integrator used for cross constellations, run on a square grid,
        gives Proakis's closed form (5th ed. sec. 4.3), down to very small error rates."""
        from brimline.daemon.core._lattice_cells import constellation_ser

        side = 2 ** (b // 2)
        axis = np.arange(-(side - 1), side, 2.0)
        grid = np.array([(x, y) for x in axis for y in axis])
        for es_n0 in lin(np.array([5.0, 20.0, 35.0])):
            assert constellation_ser(grid, es_n0) == pytest.approx(
                proakis_square_ser(2 ** b, es_n0), rel=1e-9)

    @pytest.mark.parametrize("b, es_n0_db", [(5, 17.0), (7, 23.0)])
    def test_cross_against_monte_carlo_and_bound(self, b, es_n0_db):
        """32- and 128-cross: seeded Monte Carlo with brute-force minimum-distance decisions
        (100k symbols, 4 standard deviations), and below the bound
        P_M <= 1 - [1 - 2 Q(sqrt(3 Es / ((M - 1) N0)))]**2 that holds for any QAM shape
        (Proakis 5th ed. sec. 4.3; from memory)."""
        from brimline.daemon.core._lattice_cells import cross_points

        pts = cross_points(b)
        es_n0 = float(lin(es_n0_db))
        ser = float(qam_ser(b, es_n0, cross=True))
        rng = np.random.default_rng(3)
        n = 100_000
        sigma = math.sqrt(np.mean(np.sum(pts ** 2, axis=1)) / (2 * es_n0))
        sent = rng.integers(0, pts.shape[0], n)
        rx = pts[sent] + sigma * rng.normal(size=(n, 2))
        decided = np.empty(n, dtype=int)
        for start in range(0, n, 10_000):  # chunks keep the distance table small
            chunk = rx[start:start + 10_000]
            d2 = ((chunk[:, None, :] - pts[None, :, :]) ** 2).sum(axis=2)
            decided[start:start + 10_000] = d2.argmin(axis=1)
        ser_mc = float(np.mean(decided != sent))
        assert abs(ser_mc - ser) < 4 * math.sqrt(ser / n)
        bound = 1 - (1 - 2 * stats.norm.sf(math.sqrt(3 * es_n0 / (2 ** b - 1)))) ** 2
        assert ser < bound
        assert ser < float(qam_ser(b, es_n0))  # better than the rectangular grid

    def test_bad_bits_per_symbol(self):
        with pytest.raises(InputError, match="bits_per_symbol=0"):
            qam_ser(0, 1.0)
        with pytest.raises(InputError, match="bits_per_symbol=6 must be odd"):
            qam_ser(6, 1.0, cross=True)


class TestGridSer:
    """The per-tone form the receiver uses: arrays of bit counts, 0 bits included."""

    def test_elementwise_equals_qam_ser(self):
        es_n0 = lin(np.array([0.0, 10.0, 20.0, 30.0]))
        bits = np.arange(1, 13)
        table = grid_ser(bits[:, None], es_n0[None, :])
        for i, b in enumerate(bits):
            np.testing.assert_array_equal(table[i], qam_ser(int(b), es_n0))

    def test_zero_bits_never_err(self):
        assert grid_ser(np.array([0, 0]), np.array([0.0, 10.0])).tolist() == [0.0, 0.0]

    def test_qpsk_closed_form(self):
        """QPSK SER 2Q(sqrt(rho)) - Q(sqrt(rho))**2 (Proakis 5th ed. sec. 4.3; form from
        memory), Q from scipy.stats.norm.sf."""
        rho = 2.664
        q = stats.norm.sf(math.sqrt(rho))
        assert float(grid_ser(2, rho)) == pytest.approx(2 * q - q * q, rel=1e-12)

    def test_bad_bits(self):
        with pytest.raises(InputError, match="bits must be in 0..16"):
            grid_ser(np.array([2, 17]), 1.0)


def test_module_exports():
    for name in qam.__all__:
        assert hasattr(qam, name)


def test_docstring_examples():
    """The examples in the module's docstrings run and print what they say."""
    import doctest

    result = doctest.testmod(qam, optionflags=doctest.NORMALIZE_WHITESPACE)
    assert result.attempted >= 1 and result.failed == 0
