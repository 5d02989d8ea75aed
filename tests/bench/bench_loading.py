"""Loading engine speed: Levin-Campello rate loading per frame, against a sort and a greedy loader.

All figures come from one process, timed as medians of repeated calls. The main channel is the
hard one: an invented 24-tap Rayleigh channel (exponential power-delay profile, so the per-tone
power is exponentially distributed and has deep notches), mean SNR 28 dB, 1 dB scatter, bits
0..10, gap 9.8 dB and a per-tone ceiling of 3 dB, so that most tones' tables are truncated. The
easy channel (three smooth paths plus scatter, no ceiling) is kept as ``*_easy``; ``*_binding``
is the hard channel with 3 dB more budget, where the ceiling binds at the water level. The ``*_vs_ref``
figures divide the times by the reference workload (``reference.py``), sampled between the calls.
"""

from __future__ import annotations

import time

import numpy as np
from reference import Reference

from brimline.daemon.core.loading import _greedy_oracle, load_rate

GOALS = {
    "alloc_us_1024": "median us of load_rate, 1024 tones, hard channel (info)",
    "alloc_us_4096": "median us of load_rate, 4096 tones, hard channel (info)",
    "alloc_us_1024_vs_ref": "alloc_us_1024 in reference times (info)",
    "alloc_us_4096_vs_ref": "alloc_us_4096 in reference times (info)",
    "alloc_vs_sort_4096": "load_rate time / np.sort time, 4096 tones, hard channel: goal <= 5",
    "alloc_vs_sort_4096_easy": "the same on the easy channel (three paths, no ceiling) (info)",
    "alloc_vs_sort_4096_binding": "hard channel with 3 dB more budget: the ceiling binds at the "
                                  "water level (info)",
    "alloc_vs_greedy_1024": "speedup over Hughes-Hartogs greedy, same result: goal >= 100",
}

BITS = range(11)
GAP_DB = 9.8
CAP_DB = 3.0
#: With this budget the water level passes half the ceiling, so the ceiling decides tops.
BINDING_BUDGET_DB = 3.0


def channel(n: int, seed: int = 12) -> np.ndarray:
    """Linear per-tone SNR of the invented hard channel: 24 Rayleigh taps, deep notches."""
    rng = np.random.default_rng(seed)
    taps = 24
    profile = np.exp(-np.arange(taps) / 6.0)
    profile /= profile.sum()
    g = (rng.normal(size=taps) + 1j * rng.normal(size=taps)) * np.sqrt(profile / 2.0)
    h = np.fft.fft(g, n)
    snr_db = 28.0 + 10.0 * np.log10(np.abs(h) ** 2 + 1e-12) + rng.normal(0.0, 1.0, n)
    return 10.0 ** (snr_db / 10.0)


def easy_channel(n: int, seed: int = 11) -> np.ndarray:
    """Linear per-tone SNR of an invented three-path channel with scatter (no deep notches)."""
    rng = np.random.default_rng(seed)
    k = np.arange(n)
    taps = np.array([1.0, 0.7 * np.exp(1j * 1.3), 0.4 * np.exp(-1j * 2.2)])
    delays = np.array([0.0, 3.3, 7.9])
    h = (taps * np.exp(-2j * np.pi * np.outer(k, delays) / n)).sum(axis=1)
    h /= np.sqrt(np.mean(np.abs(h) ** 2))
    snr_db = 28.0 + 20.0 * np.log10(np.abs(h) + 1e-3) + rng.normal(0.0, 1.0, n)
    return 10.0 ** (snr_db / 10.0)


def _load(snr: np.ndarray):
    """The timed call: the public free function, as the plan command and tools use it."""
    return load_rate(snr, bits=BITS, gap_db=GAP_DB, cap_db=CAP_DB)


def _load_easy(snr: np.ndarray):
    return load_rate(snr, bits=BITS, gap_db=GAP_DB)


def _load_binding(snr: np.ndarray):
    return load_rate(snr, bits=BITS, gap_db=GAP_DB, cap_db=CAP_DB, budget_db=BINDING_BUDGET_DB)


def _vs_sort(loader, snr: np.ndarray, quick: bool, repeats: int) -> float:
    """Loader time over np.sort time of the same array, the two timings interleaved."""
    t_alloc, t_sort = [], []
    for _ in range(5 if quick else 20):
        t_alloc.append(_median_s(loader, snr, repeats // 5))
        t_sort.append(_median_s(np.sort, snr, repeats // 5))
    return float(np.median(t_alloc) / np.median(t_sort))


def _median_s(fn, arg, repeats: int, ref: Reference | None = None, every: int = 20) -> float:
    """Median time of ``repeats`` calls; with ``ref``, a reference sample after every
    ``every`` calls (outside the timed calls)."""
    times = np.empty(repeats)
    for i in range(repeats):
        if ref is not None and i % every == 0:
            ref.sample()
        t0 = time.perf_counter()
        fn(arg)
        times[i] = time.perf_counter() - t0
    return float(np.median(times))


def run(quick: bool) -> dict[str, float]:
    repeats = 200 if quick else 2000
    loader = _load
    out: dict[str, float] = {}
    ref = Reference()
    for n in (1024, 4096):
        snr = channel(n)
        loader(snr)  # warm up
        mark = ref.mark()
        t_alloc = _median_s(loader, snr, repeats, ref)
        out[f"alloc_us_{n}"] = t_alloc * 1e6
        out[f"alloc_us_{n}_vs_ref"] = ref.time_ratio(t_alloc, mark)
    # Interleave the two timings so that machine load hits both alike.
    out["alloc_vs_sort_4096"] = _vs_sort(loader, channel(4096), quick, repeats)
    out["alloc_vs_sort_4096_easy"] = _vs_sort(_load_easy, easy_channel(4096), quick, repeats)
    out["alloc_vs_sort_4096_binding"] = _vs_sort(_load_binding, channel(4096), quick, repeats)
    snr = channel(1024)
    fast = loader(snr)
    greedy = _greedy_oracle(snr, bits_max=max(BITS), gap_db=GAP_DB, cap_db=CAP_DB)
    if fast.total_bits != int(greedy.sum()):
        raise AssertionError(f"greedy gives {greedy.sum()} bits, load_rate {fast.total_bits}")
    t_greedy = _median_s(
        lambda s: _greedy_oracle(s, bits_max=max(BITS), gap_db=GAP_DB, cap_db=CAP_DB), snr,
        3 if quick else 10)
    out["alloc_vs_greedy_1024"] = t_greedy / _median_s(loader, snr, repeats)
    return out
