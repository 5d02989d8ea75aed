"""The reference workload behind every ``*_vs_ref`` benchmark figure.

Absolute figures (frames/s, MS/s, us, ms) moved about 3x between two quiet machines, so each one
gets a companion ratio to this fixed workload, timed on the same box in the same run, interleaved
with the measurement it normalizes (so that load changes hit both alike):

* a time figure ``X_us`` / ``X_ms`` gets ``X_vs_ref = time / reference time`` (lower is better);
* a rate figure ``X_fps`` / ``X_msps`` gets ``X_vs_ref = rate * reference time``, the work done in
  the time of one reference workload (higher is better).

The workload mixes the kinds of work the daemon and the link model do, in roughly equal shares
of time: a batched complex64 FFT of 1024 points (as the receiver), a sort of 4096 doubles
(memory-bound, as the loader's ordering), elementwise numpy on 1024-tone arrays (dispatch-bound,
as the estimator and change control) and a plain Python loop over a dict (interpreter-bound, as
the service's bookkeeping). Its inputs are drawn once from a fixed seed. Its time is the lower
quartile of the samples taken, a statistic that a few load spikes do not move.

The reference is not a goal: ``reference_us`` (printed by ``run.py``) says how fast the box is;
compare ``*_vs_ref`` figures between boxes, absolute ones only on one box.
"""

from __future__ import annotations

import statistics
import time
from typing import Callable, Sequence

import numpy as np

__all__ = ["Reference", "interleaved", "lower_quartile", "median"]


def lower_quartile(times: Sequence[float]) -> float:
    """The lower quartile of ``times`` (the element a quarter of the way up when sorted)."""
    ordered = sorted(times)
    return ordered[len(ordered) // 4]


def median(times: Sequence[float]) -> float:
    """The median of ``times`` (the mean of the middle two for an even count)."""
    return statistics.median(times)


def interleaved(fns: Sequence[Callable[[], object]], repeats: int, *,
                statistic: Callable[[Sequence[float]], float] = lower_quartile) -> list[float]:
    """Time (s) of each function, called in turn ``repeats`` times, so load changes hit all
    alike; ``statistic`` of each one's samples (the lower quartile unless told)."""
    times: list[list[float]] = [[] for _ in fns]
    for _ in range(repeats):
        for fn, out in zip(fns, times):
            t0 = time.perf_counter()
            fn()
            out.append(time.perf_counter() - t0)
    return [statistic(t) for t in times]


class Reference:
    """The fixed reference workload and the samples of its time taken so far.

    Call :meth:`sample` between the repetitions of a measurement, then :meth:`seconds` with the
    :meth:`mark` taken before it for the reference time of that stretch.
    """

    def __init__(self, seed: int = 20261203) -> None:
        rng = np.random.default_rng(seed)
        self._symbols = (rng.standard_normal((4, 1024))
                         + 1j * rng.standard_normal((4, 1024))).astype(np.complex64)
        self._values = rng.standard_normal(4096)
        self._snr_lin = rng.uniform(0.1, 1000.0, 1024)
        self._samples: list[float] = []

    def work(self) -> float:
        """Run the workload once; returns a checksum (so nothing is optimized away)."""
        total = float(np.fft.fft(self._symbols, axis=1)[0, 1].real)
        total += float(np.sort(self._values)[2048])
        total += float(np.sort(-self._values)[2048])
        for _ in range(10):
            snr_db = 10.0 * np.log10(self._snr_lin)
            snr_db = np.maximum(snr_db - 3.0, 0.0)
            total += float(np.sum(np.where(snr_db > 10.0, snr_db, 0.0)))
        counts: dict[int, int] = {}
        for i in range(500):
            counts[i % 97] = counts.get(i % 97, 0) + i
        return total + counts[0]

    def sample(self, count: int = 1) -> None:
        """Time the workload ``count`` times and keep the times."""
        for _ in range(count):
            t0 = time.perf_counter()
            self.work()
            self._samples.append(time.perf_counter() - t0)

    def mark(self) -> int:
        """A position in the samples, for :meth:`seconds` of what follows."""
        return len(self._samples)

    def seconds(self, since: int = 0) -> float:
        """Lower-quartile time (s) of the samples taken since ``since`` (a :meth:`mark`); takes
        a few samples first when there are none."""
        if len(self._samples) <= since:
            self.sample(5)
        return lower_quartile(self._samples[since:])

    def time_ratio(self, figure_s: float, since: int = 0) -> float:
        """A time figure (s) in reference times: ``figure_s / seconds(since)``."""
        return figure_s / self.seconds(since)

    def rate_ratio(self, per_s: float, since: int = 0) -> float:
        """A rate figure (per second) as the work done in one reference time."""
        return per_s * self.seconds(since)


if __name__ == "__main__":
    ref = Reference()
    ref.sample(200)
    print(f"reference_us {ref.seconds() * 1e6:.1f}")
