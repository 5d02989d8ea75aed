"""Pictures of an offline run: what the channel did and how the loading followed it.

:func:`render_report` draws one page from an
:class:`~brimline.daemon.runtime.offline.OfflineResult` that kept its SNR (``keep_snr=True``):

1. per-tone SNR over time (waterfall; tone index in the daemon's signed FFT-bin numbering);
2. bits per tone of the map in force over time, on the same axes;
3. rate (bits per OFDM symbol, and Mbit/s on the right) and the live margin over target, with
   every map change marked by kind and the fallback stretches shaded;
4. a per-tone snapshot at one time: SNR and bits, and power in dB relative to nominal.

The page is A4 landscape-sized, drawn with matplotlib's Agg backend (no display needed) in
colours that stay apart in greyscale print (the waterfall uses ``cividis``). ``.png`` and
``.pdf`` are matplotlib's own; ``.html`` is one self-contained page with the picture inline
and the summary beside it.

matplotlib is an optional extra (``pip install 'brimline[report]'``); it is imported inside
:func:`render_report` so the daemon never loads it.
"""

from __future__ import annotations

import base64
import html
import io
import math
from pathlib import Path
from typing import Sequence

import numpy as np

from brimline.daemon.errors import InputError
from brimline.daemon.runtime.offline import OfflineResult

__all__ = ["render_report", "REPORT_SUFFIXES", "KIND_STYLE", "waterfall_rows"]

REPORT_SUFFIXES = (".png", ".pdf", ".html")

#: Marker colour and line style per decision kind (distinct in colour and in greyscale).
KIND_STYLE = {
    "reload": ("#1f77b4", "-"),
    "bit_swap": ("#7f7f7f", ":"),
    "emergency": ("#d62728", "-"),
    "fallback": ("#000000", "--"),
}

_MAX_ROWS = 1200  # waterfall rows drawn at most; longer runs are averaged in time bins


def waterfall_rows(time_s: np.ndarray, values: np.ndarray, max_rows: int = _MAX_ROWS,
                   how: str = "mean") -> tuple[np.ndarray, np.ndarray]:
    """Bin a (frames, tones) array to at most ``max_rows`` rows of consecutive frames.

    Parameters
    ----------
    time_s : ndarray, (F,)
        Frame times, ascending.
    values : ndarray, (F, T)
    max_rows : int
    how : {"mean", "min"}
        Reduction within a bin (NaN ignored).

    Returns
    -------
    times : ndarray, (R + 1,)
        Bin edges in time, s (for ``pcolormesh``).
    rows : ndarray, (R, T)
        A stretch without frames (longer than two usual bins) is one row of NaN.
    """
    t = np.asarray(time_s, dtype=np.float64)
    v = np.asarray(values, dtype=np.float64)
    n = t.size
    if n == 0:
        return np.zeros(1), v.reshape(0, v.shape[1] if v.ndim == 2 else 0)
    k = min(n, max(1, int(max_rows)))
    edges = np.linspace(0, n, k + 1).round().astype(np.intp)
    reduce = np.fmin.reduceat if how == "min" else np.add.reduceat
    rows = reduce(np.nan_to_num(v, nan=np.inf) if how == "min" else v, edges[:-1], axis=0)
    if how == "mean":
        rows = rows / np.diff(edges)[:, None]
    step = float(np.median(np.diff(t))) if n > 1 else 1.0
    starts = t[edges[:-1]]
    tedges = np.append(starts, t[-1] + step)
    # A stretch without frames (over twice the usual bin) becomes a row of NaN, drawn as a
    # gap, instead of the bin before it stretching across.
    usual = float(np.median(np.diff(tedges))) if tedges.size > 1 else step
    wide = np.flatnonzero(np.diff(tedges) > 2.0 * max(usual, step))
    if wide.size:
        ends = tedges[wide] + max(usual, step)
        tedges = np.insert(tedges, wide + 1, ends)
        rows = np.insert(rows, wide + 1, np.nan, axis=0)
    return tedges, rows


def _tone_edges(tones: np.ndarray) -> np.ndarray:
    t = np.asarray(tones, dtype=np.float64)
    if t.size == 1:
        return np.array([t[0] - 0.5, t[0] + 0.5])
    mid = (t[:-1] + t[1:]) / 2
    return np.concatenate([[t[0] - 0.5], mid, [t[-1] + 0.5]])


def _pick_at(result: OfflineResult, at_s: float | None) -> int:
    tl = result.timeline
    if at_s is None:
        # The end of the run, where the final map is in force.
        return len(tl) - 1
    if not math.isfinite(at_s):
        raise InputError(f"--at={at_s} must be a time in seconds")
    if at_s < tl.time_s[0] or at_s > tl.time_s[-1]:
        raise InputError(f"--at={at_s:g} s lies outside the replayed times "
                         f"[{tl.time_s[0]:g}, {tl.time_s[-1]:g}] s")
    return int(np.searchsorted(tl.time_s, at_s, side="right") - 1)


def _map_per_frame(result: OfflineResult, what: str) -> np.ndarray:
    """(frames, tones) of the map in force: ``bits`` or ``power_db`` (NaN before a map)."""
    tl = result.timeline
    n_tones = result.tone_index.size
    out = np.full((len(tl), n_tones), np.nan)
    if not result.maps:
        return out
    by_seq = {m.seq: k for k, m in enumerate(result.maps)}
    if what == "bits":
        table = np.vstack([m.bits for m in result.maps]).astype(np.float64)
    else:
        with np.errstate(divide="ignore"):
            table = 10.0 * np.log10(np.vstack([m.power_lin for m in result.maps])
                                    .astype(np.float64))
        table[~np.isfinite(table)] = np.nan
    has = tl.seq >= 0
    idx = np.array([by_seq.get(int(s), -1) for s in tl.seq[has]], dtype=np.intp)
    good = idx >= 0
    rows = np.flatnonzero(has)[good]
    out[rows] = table[idx[good]]
    return out


def _broken_at_gaps(t: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``t, y`` with a NaN inserted where frames are missing (a gap over twice the usual
    interval), so a line is not drawn across a stretch the recording does not cover."""
    if t.size < 3:
        return t, y
    dt = np.diff(t)
    cut = np.flatnonzero(dt > 2.0 * float(np.median(dt))) + 1
    return np.insert(t.astype(float), cut, np.nan), np.insert(y.astype(float), cut, np.nan)


def _spans(mask: np.ndarray, t: np.ndarray) -> list[tuple[float, float]]:
    """Time spans where ``mask`` holds (each to the next frame's time)."""
    if not mask.any():
        return []
    step = float(np.median(np.diff(t))) if t.size > 1 else 1.0
    d = np.diff(np.concatenate([[0], mask.astype(np.int8), [0]]))
    starts, stops = np.flatnonzero(d == 1), np.flatnonzero(d == -1)
    return [(float(t[a]), float(t[b]) if b < t.size else float(t[-1] + step))
            for a, b in zip(starts, stops)]


def render_report(result: OfflineResult, path: str | Path, *, at_s: float | None = None,
                  title: str | None = None, summary_lines: Sequence[str] = ()) -> Path:
    """Draw the report page of ``result`` to ``path`` (``.png``, ``.pdf`` or ``.html``).

    Parameters
    ----------
    result : OfflineResult
        A run made with ``keep_snr=True``.
    path : str or Path
        Output file; its suffix picks the format.
    at_s : float, optional
        Time of the per-tone snapshot, s (default: the last replayed estimate).
    title : str, optional
        Page title (default: the recording's name).
    summary_lines : sequence of str
        Text shown under the picture in the HTML page.

    Returns
    -------
    Path
        The file written.

    Raises
    ------
    InputError
        An unknown suffix, a run without SNR or without estimates, ``at_s`` outside the run,
        matplotlib missing (with the install hint), or a file that cannot be written.
    """
    out = Path(path)
    if out.suffix not in REPORT_SUFFIXES:
        raise InputError(f"-o {out}: name the report .png, .pdf or .html")
    if result.snr_db is None:
        raise InputError("the run kept no SNR: replay it with keep_snr=True")
    tl = result.timeline
    if len(tl) == 0:
        raise InputError(f"{result.source}: no estimates were replayed (window or recording "
                         f"empty): nothing to draw")
    at = _pick_at(result, at_s)
    try:  # optional extra: the daemon itself never needs matplotlib
        import matplotlib
        matplotlib.use("Agg", force=True)
        from matplotlib.figure import Figure
        from matplotlib.patches import Patch
    except ImportError:
        raise InputError("brimline report needs matplotlib: pip install 'brimline[report]'") \
            from None

    tones = result.tone_index.astype(np.float64)
    t = tl.time_s
    fig = Figure(figsize=(11.69, 8.27), dpi=110, layout="constrained")
    grid = fig.add_gridspec(3, 2, height_ratios=[1.25, 1.0, 1.0], width_ratios=[1.0, 1.0])
    ax_snr = fig.add_subplot(grid[0, 0])
    ax_bits = fig.add_subplot(grid[0, 1], sharey=ax_snr, sharex=ax_snr)
    ax_rate = fig.add_subplot(grid[1, :])
    ax_snap = fig.add_subplot(grid[2, 0])
    ax_pow = fig.add_subplot(grid[2, 1], sharex=ax_snap)
    fig.suptitle(title or f"brimline report: {Path(result.source).name}", fontsize=13,
                 fontweight="bold")

    # 1. SNR waterfall: time across, tone up, as a spectrogram reads.
    tedges, snr_rows = waterfall_rows(t, result.snr_db, how="mean")
    finite = snr_rows[np.isfinite(snr_rows)]
    lo, hi = (np.percentile(finite, [1, 99]) if finite.size else (0.0, 1.0))
    snr_cmap = matplotlib.colormaps["cividis"].with_extremes(bad="#ffffff")
    mesh = ax_snr.pcolormesh(tedges, _tone_edges(tones), snr_rows.T, cmap=snr_cmap,
                             vmin=lo, vmax=hi, shading="flat", rasterized=True)
    fig.colorbar(mesh, ax=ax_snr, label="SNR (dB)", pad=0.01)
    ax_snr.set_title("Per-tone SNR of the estimates (white: no estimates)")
    ax_snr.set_ylabel("tone index (signed FFT bin)")
    ax_snr.set_xlabel("time (s)")

    # 2. Bits per tone of the map in force.
    bits = _map_per_frame(result, "bits")
    bit_edges, bit_rows = waterfall_rows(t, bits, how="min")
    bit_rows[np.isinf(bit_rows)] = np.nan
    top = int(np.nanmax(bits)) if np.isfinite(bits).any() else 1
    cmap = matplotlib.colormaps["viridis"].resampled(top + 1).with_extremes(bad="#ffffff")
    mesh = ax_bits.pcolormesh(bit_edges, _tone_edges(tones), bit_rows.T, cmap=cmap,
                              vmin=-0.5, vmax=top + 0.5, shading="flat", rasterized=True)
    fig.colorbar(mesh, ax=ax_bits, label="bits per tone", pad=0.01,
                 ticks=range(0, top + 1, max(1, (top + 1) // 5)))
    ax_bits.set_title("Bits per tone of the map in force")
    ax_bits.set_xlabel("time (s)")
    ax_bits.tick_params(labelleft=False)

    # 3. Rate and live margin, with map changes and fallback marked.
    ax_rate.step(t, tl.bits_per_symbol, where="post", color="#1f3b73", lw=1.6,
                 label="rate (bits/symbol)")
    ax_rate.set_ylabel("rate (bits per OFDM symbol)")
    ax_rate.set_xlabel("time (s)")
    ax_rate.set_xlim(t[0], t[-1] if t[-1] > t[0] else t[0] + 1.0)
    ax_rate.set_ylim(0, max(1, int(tl.bits_per_symbol.max())) * 1.15)
    mbps = ax_rate.secondary_yaxis(
        "right", functions=(lambda b: b * result.symbol_rate_hz / 1e6,
                            lambda r: r * 1e6 / result.symbol_rate_hz))
    mbps.set_ylabel("rate (Mbit/s)")
    ax_m = ax_rate.twinx()
    ax_m.spines["right"].set_position(("axes", 1.07))
    ax_m.plot(*_broken_at_gaps(t, tl.live_margin_db), color="#c45100", lw=0.9,
              label="live margin over target")
    ax_m.axhline(0.0, color="#c45100", lw=0.8, ls=":")
    ax_m.set_ylabel("live margin over target (dB)", color="#c45100")
    ax_m.tick_params(axis="y", colors="#c45100")
    live = tl.live_margin_db[np.isfinite(tl.live_margin_db)]
    if live.size:
        ax_m.set_ylim(max(-20.0, float(live.min()) - 1.0), float(live.max()) + 1.0)
    for a, b in _spans(tl.fallback, t):
        ax_rate.axvspan(a, b, color="#bbbbbb", alpha=0.6, lw=0)
    seen = set()
    for e in result.events:
        color, style = KIND_STYLE.get(e.kind, ("#444444", "-"))
        ax_rate.axvline(e.time_s, color=color, ls=style, lw=1.1,
                        label=None if e.kind in seen else f"map: {e.kind.replace('_', ' ')}")
        seen.add(e.kind)
    ax_rate.axvline(t[at], color="#2ca02c", lw=1.0, ls="-.", label="snapshot time")
    handles, labels = ax_rate.get_legend_handles_labels()
    h2, l2 = ax_m.get_legend_handles_labels()
    if tl.fallback.any():
        handles.append(Patch(color="#bbbbbb", alpha=0.6))
        labels.append("fallback map in force")
    ax_rate.legend(handles + h2, labels + l2, loc="upper center", bbox_to_anchor=(0.5, -0.2),
                   fontsize=8, ncols=8, frameon=False)
    s = result.summary
    ax_rate.set_title(f"Rate and margin: {s.maps} maps "
                      f"({', '.join(f'{k} {v}' for k, v in s.maps_by_kind.items()) or 'none'}), "
                      f"{s.time_below_target_s:.2f} s below target margin")

    # 4. Snapshot at the chosen time.
    snr_now = result.snr_db[at].astype(np.float64)
    bits_now = bits[at]
    ax_snap.plot(tones, snr_now, color="#1f3b73", lw=1.0, marker=".", ms=2.5,
                 label="SNR (dB)")
    ax_snap.set_ylabel("SNR (dB)", color="#1f3b73")
    ax_snap.set_xlabel("tone index (signed FFT bin)")
    ax_b = ax_snap.twinx()
    ax_b.step(tones, bits_now, where="mid", color="#c45100", lw=1.2, label="bits")
    ax_b.set_ylabel("bits per tone", color="#c45100")
    ax_b.set_ylim(-0.3, max(1, top) + 0.8)
    ax_snap.set_title(f"Snapshot at t = {t[at]:.2f} s (frame {int(tl.frame[at])}): "
                      f"SNR and bits")
    power_db = _map_per_frame(result, "power_db")[at]
    ax_pow.bar(tones, np.nan_to_num(power_db, nan=0.0), width=0.85, color="#5b7aa8",
               label="power (dB re nominal)")
    unloaded = ~np.isfinite(power_db)
    if unloaded.any():
        ax_pow.plot(tones[unloaded], np.zeros(int(unloaded.sum())), "x", color="#d62728",
                    ms=4, label="tone off (0 bits)")
        ax_pow.legend(loc="lower right", fontsize=8)
    ax_pow.axhline(0.0, color="black", lw=0.6)
    ax_pow.set_ylabel("power (dB re nominal)")
    ax_pow.set_xlabel("tone index (signed FFT bin)")
    ax_pow.set_title("Snapshot: power per tone of the map in force")
    for ax in (ax_snr, ax_bits, ax_rate, ax_snap, ax_pow):
        ax.grid(True, color="#dddddd", lw=0.5)
        ax.set_axisbelow(True)

    try:
        if out.suffix == ".html":
            buf = io.BytesIO()
            fig.savefig(buf, format="png")
            out.write_text(_html_page(fig.get_suptitle(), buf.getvalue(), summary_lines),
                           encoding="utf-8")
        else:
            # Fixed metadata so that the same run gives the same file.
            meta = {"Software": "brimline"} if out.suffix == ".png" else {
                "Creator": "brimline", "Producer": "brimline", "CreationDate": None}
            fig.savefig(out, metadata=meta)
    except OSError as exc:
        raise InputError(f"{out}: cannot write: {exc.strerror or exc}") from None
    return out


def _html_page(title: str, png: bytes, summary_lines: Sequence[str]) -> str:
    data = base64.b64encode(png).decode("ascii")
    text = html.escape("\n".join(summary_lines))
    return (f"<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            f"<title>{html.escape(title)}</title>"
            f"<style>body{{font-family:sans-serif;margin:1.5em;color:#111}}"
            f"img{{max-width:100%;height:auto}}pre{{background:#f4f4f4;padding:1em}}</style>"
            f"</head><body><h1>{html.escape(title)}</h1>"
            f"<img alt=\"{html.escape(title)}\" src=\"data:image/png;base64,{data}\">"
            f"<pre>{text}</pre></body></html>\n")
