"""Exact symbol error rate of a two-dimensional constellation by its decision cells.

Minimum-distance detection on AWGN decides for the point whose Voronoi cell holds the received
sample. Each cell is a convex polygon (the points' half-plane bisectors, clipped to a box far out
in the tails), and the probability of leaving it is integrated in one dimension: in each strip
between the polygon's vertex abscissas the cell lies between two straight lines, so

    P(out) = P(x outside the cell's x range)
             + integral over the x range of phi(x) [Phi(y_low(x)) + Q(y_high(x))] dx.

Every term is a tail probability, so small error rates keep their relative accuracy. Used for
cross constellations, whose cells next to the missing corners are not rectangles.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import integrate, special

__all__ = ["cross_points", "constellation_ser"]


def cross_points(bits_per_symbol: int) -> np.ndarray:
    """Points of the cross constellation with an odd number (>= 5) of bits, in units of d/2.

    A square of ``3 * 2**((b-3)/2)`` points per side with a square of ``2**((b-5)/2)`` points
    per side removed at each corner (32-QAM: 6 x 6 less 4 corners; 128-QAM: 12 x 12 less 4 x 4).
    Coordinates are odd integers, so neighbours are 2 apart.
    """
    b = int(bits_per_symbol)
    if b < 5 or b % 2 == 0:
        raise ValueError(f"cross constellations need an odd bits_per_symbol >= 5, got {b}")
    side = 3 * 2 ** ((b - 3) // 2)
    corner = 2 ** ((b - 5) // 2)
    axis = np.arange(-(side - 1), side, 2)
    x, y = np.meshgrid(axis, axis, indexing="ij")
    inner = side - 1 - 2 * corner
    keep = ~((np.abs(x) > inner) & (np.abs(y) > inner))
    pts = np.column_stack([x[keep], y[keep]]).astype(np.float64)
    assert pts.shape[0] == 2 ** b
    return pts


def _clip(poly: list[tuple[float, float]], a: np.ndarray, c: float):
    """Keep the part of convex polygon ``poly`` with ``a . r <= c`` (Sutherland-Hodgman)."""
    out = []
    n = len(poly)
    for i in range(n):
        p, q = poly[i], poly[(i + 1) % n]
        fp = a[0] * p[0] + a[1] * p[1] - c
        fq = a[0] * q[0] + a[1] * q[1] - c
        if fp <= 0:
            out.append(p)
        if (fp < 0 < fq) or (fq < 0 < fp):
            t = fp / (fp - fq)
            out.append((p[0] + t * (q[0] - p[0]), p[1] + t * (q[1] - p[1])))
    return out


def _cell(points: np.ndarray, i: int, box: float) -> list[tuple[float, float]]:
    """Voronoi cell of ``points[i]``, relative to that point, clipped to ``|r| <= box``."""
    s = points[i]
    poly = [(-box, -box), (box, -box), (box, box), (-box, box)]
    near = np.flatnonzero(np.hypot(*(points - s).T) <= 8.0)  # bisectors farther out never bind
    for j in near:
        if j == i:
            continue
        a = points[j] - s  # half-plane a . r <= |a|**2 / 2, with r relative to s
        poly = _clip(poly, a, 0.5 * float(a @ a))
    return poly


def _outside(poly, sigma: float) -> float:
    """P(a zero-mean Gaussian with std ``sigma`` per dimension falls outside ``poly``)."""
    xs = np.array([p[0] for p in poly])
    x_min, x_max = xs.min(), xs.max()
    total = special.ndtr(x_min / sigma) + special.ndtr(-x_max / sigma)
    edges = list(zip(poly, poly[1:] + poly[:1]))
    breaks = np.unique(xs)

    def bounds(x):
        hits = []
        for (x0, y0), (x1, y1) in edges:
            if min(x0, x1) <= x <= max(x0, x1) and x0 != x1:
                hits.append(y0 + (x - x0) * (y1 - y0) / (x1 - x0))
        return min(hits), max(hits)

    for lo, hi in zip(breaks[:-1], breaks[1:]):
        # Inside a strip the cell lies between two straight lines: interpolate the ends.
        lo_bottom, lo_top = bounds(lo)
        hi_bottom, hi_top = bounds(hi)
        width = hi - lo

        def f(u, lo=lo, width=width, lb=lo_bottom, lt=lo_top, hb=hi_bottom, ht=hi_top):
            t = (u * sigma - lo) / width
            y_lo = lb + t * (hb - lb)
            y_hi = lt + t * (ht - lt)
            return (math.exp(-0.5 * u * u) / math.sqrt(2 * math.pi)
                    * (special.ndtr(y_lo / sigma) + special.ndtr(-y_hi / sigma)))

        a, b = max(lo / sigma, -40.0), min(hi / sigma, 40.0)
        if a >= b:
            continue
        pts = [0.0] if a < 0.0 < b else None
        val, _ = integrate.quad(f, a, b, points=pts, epsabs=0.0, epsrel=1e-11, limit=200)
        total += val
    return float(total)


def constellation_ser(points: np.ndarray, es_n0: float) -> float:
    """Exact minimum-distance symbol error rate of equiprobable ``points`` at ``Es/N0``.

    ``points`` are in any unit; the noise is scaled so that the average point energy over N0
    is ``es_n0``. The cells of symmetric constellations repeat by quadrant: only points with
    x >= 0 and y >= 0 are integrated, each weighted by its symmetry class when the
    constellation is symmetric under both sign flips (checked).
    """
    pts = np.asarray(points, dtype=np.float64)
    energy = float(np.mean(np.sum(pts * pts, axis=1)))
    sigma = math.sqrt(energy / (2.0 * es_n0))  # per dimension, same units as the points
    box = float(np.abs(pts).max()) + 60.0 * sigma + 4.0
    keyset = {tuple(p) for p in pts}
    symmetric = all((-p[0], p[1]) in keyset and (p[0], -p[1]) in keyset for p in keyset)
    total = 0.0
    for i, p in enumerate(pts):
        if symmetric:
            if p[0] < 0 or p[1] < 0:
                continue
            weight = (1 if p[0] == 0 else 2) * (1 if p[1] == 0 else 2)
        else:
            weight = 1
        total += weight * _outside(_cell(pts, i, box), sigma)
    return total / pts.shape[0]
