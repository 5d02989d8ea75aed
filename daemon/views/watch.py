"""Live terminal view of a daemon's status stream (``brimline watch``).

Rendering is pure: :func:`render` takes a status dict (or None), the alarm memory and the
screen size and gives a ``rich`` renderable, so the screen can be tested at fixed sizes without
a terminal. :func:`watch` subscribes to the status endpoint (and optionally to a transmitter's
status, ``brimline tx``) and redraws with ``rich.live.Live`` on a terminal, or prints one plain
line per status message when standard output is not a terminal (pipes, logs, CI).

The screen, top to bottom, in the order things fold away when the terminal is small (the last
folds first): alarms with their counts (always kept); a line with link time, source (with the
radio's sample clock offset, ``sample clock +50.0 ppm``, once measured) and map;
the numbers (data rate and line rate, headroom and target margin, goodput and errors, the
transmitter); the band picture; the latest maps; details (frames, followers, outer loop).

The band picture (:func:`band_picture`) is a trace, not bars: per screen column of whole data
tones, the SNR is a mark at its height on a fixed dB scale (``--snr-scale``, default 0..40 dB;
half-row steps; values beyond the scale sit on its edge as ``▲``/``▼``); under it a shaded
strip of bits per tone (legend on screen); under that the power relative to nominal as signed
bars around a 0 dB line (a full row is :data:`POWER_ROW_DB`); then a tone axis labelled in the
tone numbering of the plan, maps and logs (signed FFT bins; the pilots and DC carry no data and
are not columns). Each screen column covers the same number of whole data tones, stated above
the picture; the SNR shown is the column's lowest (what limits loading), bits and power are
column means.

Alarms stay (:func:`update_alarms`): an alarm raised in any status message is listed at the top
with how often it was raised and the link time since it was last seen, until it has been absent
for ``clear_after_s`` of link time (default 10 s); then it folds into one line of counts.
Emergency and fallback counts are the daemon's own (maps published of that kind), so they hold
even when the view started late; other counts are what this view saw.

The watcher's SUB sockets refuse frames above the codec's 1 MiB frame bound and decode only
plain dict messages; anything else is dropped and counted by reason (shown under the details).
With a CURVE-protected status stream, give :func:`watch` the daemon's public key file and this
watcher's own ``.key_secret`` file (made by ``brimline keys``; its ``.key`` goes into the
daemon's ``publish.curve_clients_dir`` when that is set).
"""

from __future__ import annotations

import logging
import math
import sys
import time
from pathlib import Path
from typing import Any, Callable, Mapping, TextIO

import numpy as np
import zmq
from rich.console import Console
from rich.live import Live
from rich.panel import Panel
from rich.text import Text

from brimline.daemon.errors import InputError, ProtocolError
from brimline.daemon.net.curve import apply_client
from brimline.daemon.net.drops import DropCounter, limit_inbound
from brimline.daemon.runtime.status import ALARMS, summary_line
from brimline.daemon.runtime.transmitter import TX_STATUS_TYPE, tx_summary_line
from brimline.daemon.wire import codec

__all__ = ["render", "band_picture", "update_alarms", "parse_snr_scale", "screen_columns",
           "watch", "DEFAULT_STATUS_ENDPOINT", "DEFAULT_SNR_SCALE_DB", "DEFAULT_CLEAR_AFTER_S",
           "POWER_ROW_DB", "BIT_SHADES"]

DEFAULT_STATUS_ENDPOINT = "tcp://127.0.0.1:7343"
#: The SNR scale of the band picture, dB (low, high); ``--snr-scale`` changes it.
DEFAULT_SNR_SCALE_DB = (0.0, 40.0)
#: Link time an alarm must be absent before it is cleared from the top, s.
DEFAULT_CLEAR_AFTER_S = 10.0
#: Power above or below nominal that fills one row of the power bars, dB.
POWER_ROW_DB = 6.0
#: Shades of the bits strip: (lowest bits of the shade, glyph, style), ascending.
BIT_SHADES = ((0, "·", "grey42"), (1, "░", "red3"), (3, "▒", "dark_orange"),
              (5, "▓", "gold3"), (7, "█", "green3"))
#: Seconds without a status message after which the view says the daemon went quiet.
QUIET_AFTER_S = 3.0

log = logging.getLogger("brimline.watch")

_GUTTER = 10  # width of the labels left of the band picture
_LOWER = " ▁▂▃▄▅▆▇█"


# --------------------------------------------------------------------------- options


def parse_snr_scale(text: str) -> tuple[float, float]:
    """Parse ``--snr-scale LOW:HIGH`` (dB), e.g. ``0:40``.

    Raises
    ------
    InputError
        Naming the option and the value when it is not two finite numbers with LOW < HIGH.
    """
    low, sep, high = str(text).partition(":")
    try:
        lo, hi = float(low), float(high)
    except ValueError:
        lo = hi = math.nan
    if not sep or not (math.isfinite(lo) and math.isfinite(hi)) or not lo < hi:
        raise InputError(f"--snr-scale={text!r} must be LOW:HIGH in dB with LOW < HIGH, "
                         f"e.g. 0:40")
    return lo, hi


# --------------------------------------------------------------------------- alarms


def update_alarms(book: Mapping[str, Mapping[str, Any]] | None, status: Mapping[str, Any], *,
                  clear_after_s: float = DEFAULT_CLEAR_AFTER_S) -> dict[str, dict[str, Any]]:
    """The alarm memory after one more status message (pure: a new dict is returned).

    Parameters
    ----------
    book : mapping or None
        The memory so far, per alarm: ``count`` (times raised), ``raised_s`` (link time it was
        last raised), ``seen_s`` (link time it was last seen raised), ``active`` (raised in
        the latest message) and ``cleared`` (absent for ``clear_after_s`` or more).
    status : mapping
        A status message (its ``time_s``, ``alarms``, ``maps_published``, ``changes``).
    clear_after_s : float
        Link time an alarm must be absent before it counts as cleared, s.

    Returns
    -------
    dict
    """
    out = {k: dict(v) for k, v in dict(book or {}).items()}
    now = status.get("time_s")
    now = float(now) if isinstance(now, (int, float)) and math.isfinite(now) else None
    raised = [str(a) for a in status.get("alarms", [])]
    for name in raised:
        e = out.setdefault(name, {"count": 0, "raised_s": now, "seen_s": now,
                                  "active": False, "cleared": False})
        if not e["active"]:
            e["count"] += 1
            e["raised_s"] = now
        e.update(active=True, cleared=False, seen_s=now)
    # Map kinds: the daemon counts them, and the latest such change dates the last one.
    published = dict(status.get("maps_published") or {})
    for name in ("emergency", "fallback"):
        n = int(published.get(name, 0))
        if not n:
            continue
        e = out.setdefault(name, {"count": 0, "raised_s": None, "seen_s": None,
                                  "active": False, "cleared": False})
        e["count"] = max(e["count"], n)
        times = [float(c["time_s"]) for c in status.get("changes", [])
                 if c.get("kind") == name and c.get("time_s") is not None]
        if times:
            e["raised_s"] = max(times)
            e["seen_s"] = max(e["seen_s"] or -math.inf, max(times))
    for name, e in out.items():
        if name not in raised:
            e["active"] = False
            if now is not None:
                e["cleared"] = e["seen_s"] is None or now - e["seen_s"] >= clear_after_s
    return out


def _alarm_lines(book: Mapping[str, Mapping[str, Any]], status: Mapping[str, Any] | None,
                 silent_s: float | None, width: int, max_lines: int) -> list[Text]:
    now = None if status is None else status.get("time_s")
    shown = [(k, v) for k, v in book.items() if v.get("active") or not v.get("cleared")]
    shown.sort(key=lambda kv: (not kv[1].get("active"), -(kv[1].get("raised_s") or 0.0)))
    lines: list[Text] = []
    if silent_s is not None and silent_s > QUIET_AFTER_S:
        t = Text()
        t.append(" QUIET ", style="bold white on red")
        t.append(f" no status message for {silent_s:.0f} s (wall clock)")
        lines.append(t)
    for name, e in shown:
        t = Text()
        t.append(f" {name.upper()} ", style="bold white on red" if e.get("active")
                 else "bold black on yellow")
        ago = ("-" if e.get("raised_s") is None or now is None
               else f"{max(0.0, now - e['raised_s']):.1f} s")
        t.append(f" x{e.get('count', 0)}, last {ago} ago"
                 + ("" if e.get("active") else ", now absent") + "  ")
        t.append(ALARMS.get(name, ""), style="dim")
        lines.append(t)
    earlier = [(k, v) for k, v in book.items() if v.get("cleared") and not v.get("active")]
    if earlier:
        t = Text("cleared alarms: ", style="dim")
        t.append(", ".join(f"{k} x{v.get('count', 0)}" for k, v in sorted(earlier)),
                 style="yellow")
        lines.append(t)
    if not lines:
        lines.append(Text("no alarms", style="green"))
    if len(lines) > max_lines >= 2:  # keep the first ones, say how many more
        more = len(lines) - max_lines + 1
        lines = lines[:max_lines - 1] + [Text(f"... and {more} more alarm lines",
                                              style="bold red")]
    elif len(lines) > max_lines:
        first = Text(f"+{len(lines) - 1} more  ", style="bold red")
        first.append_text(lines[0])
        lines = [first]
    return [_fit(t, width) for t in lines]


# --------------------------------------------------------------------------- band picture


def screen_columns(n_columns: int, width: int) -> int:
    """Status band columns merged into one screen column so ``n_columns`` fit ``width``
    cells: ``ceil(n_columns / width)`` (each screen column then holds that many times the
    status's ``tones_per_column`` whole tones)."""
    if n_columns <= 0:
        return 1
    return max(1, -(-n_columns // max(1, width)))


def _merge(values: list, k: int, how: str) -> list:
    arr = np.array([np.nan if v is None else float(v) for v in values], dtype=np.float64)
    if arr.size == 0:
        return []
    n = -(-arr.size // k)
    grid = np.full(n * k, np.nan)
    grid[:arr.size] = arr
    grid = grid.reshape(n, k)
    out = []
    for row in grid:
        good = row[np.isfinite(row)]
        out.append(None if good.size == 0 else
                   float(good.min() if how == "min" else good.mean()))
    return out


def _snr_style(snr_db: float) -> str:
    if snr_db < 10:
        return "red"
    if snr_db < 20:
        return "yellow"
    return "green"


def _shade(bits: float | None) -> tuple[str, str]:
    if bits is None:
        return " ", ""
    b = int(round(bits))
    glyph, style = BIT_SHADES[0][1], BIT_SHADES[0][2]
    for low, g, s in BIT_SHADES:
        if b >= low:
            glyph, style = g, s
    return glyph, style


def _tone_ticks(first_tones: list[int], last_tone: int, width: int) -> tuple[str, str]:
    """Tick row and label row for columns that start at ``first_tones`` (ascending)."""
    n = len(first_tones)
    span = max(1, last_tone - first_tones[0])
    step = next((s for s in (5, 10, 20, 25, 50, 100, 200, 250, 500, 1000)
                 if span / s <= max(1, width // 7)), 1000)
    ticks = [" "] * n
    labels = [" "] * (n + 8)
    lo = math.ceil(first_tones[0] / step) * step
    edges = list(first_tones) + [last_tone + 1]
    placed_until = -1
    for t in range(lo, last_tone + 1, step):
        j = next((i for i in range(n) if edges[i] <= t < edges[i + 1]), None)
        if j is None:
            continue
        ticks[j] = "┬"
        text = str(t)
        start = max(0, j - len(text) // 2)
        if start > placed_until and start + len(text) <= n + 1:
            labels[start:start + len(text)] = list(text)
            placed_until = start + len(text)
    tick_row = "".join("┬" if c == "┬" else "─" for c in ticks)
    return tick_row, "".join(labels).rstrip()


def band_picture(band: Mapping[str, Any], *, width: int,
                 snr_scale_db: tuple[float, float] = DEFAULT_SNR_SCALE_DB,
                 snr_rows: int = 5, compact: bool = False) -> list[Text]:
    """The band picture as lines of at most ``width`` cells (see the module docstring).

    Parameters
    ----------
    band : mapping
        The status message's ``band`` block (``tone_index``, ``tones_per_column``,
        ``snr_db``, ``bits``, ``power_db``, ``tone_last``).
    width : int
        Cells available, labels included.
    snr_scale_db : (float, float)
        Fixed SNR scale, dB (low, high).
    snr_rows : int
        Rows of the SNR trace (each ``(high - low) / snr_rows`` dB, two marks per row).
    compact : bool
        Leave out the legend line.

    Returns
    -------
    list of rich.text.Text
    """
    first = [int(t) for t in band.get("tone_index") or []]
    if not first:
        return [Text("band: no tones yet (no estimate or map)", style="dim")]
    per = int(band.get("tones_per_column") or 1)
    plot_w = max(8, width - _GUTTER)
    k = screen_columns(len(first), plot_w)
    cols_first = first[::k]
    n = len(cols_first)
    tone_last = int(band.get("tone_last", first[-1]))
    snr = _merge(list(band.get("snr_db") or []), k, "min") or [None] * n
    bits = _merge(list(band.get("bits") or []), k, "mean") or [None] * n
    power = _merge(list(band.get("power_db") or []), k, "mean") or [None] * n
    lo, hi = snr_scale_db
    rows = max(2, int(snr_rows))
    per_row = (hi - lo) / rows
    lines: list[Text] = []
    head = Text("band  ", style="bold")
    head.append(f"data tones {first[0]}..{tone_last}, {k * per} tone"
                f"{'s' if k * per > 1 else ''} per column, SNR scale fixed {lo:g}..{hi:g} dB",
                style="dim")
    lines.append(head)
    # SNR trace: level in half rows on the fixed scale.
    levels = []
    for v in snr:
        if v is None:
            levels.append(None)
        else:
            levels.append((v - lo) / (hi - lo) * 2 * rows)
    for r in range(rows - 1, -1, -1):
        edge = lo + (r + 1) * per_row
        label = f"{edge:.0f}" if float(per_row).is_integer() or per_row >= 5 else f"{edge:.1f}"
        name = "SNR" if r == rows - 1 else "dB" if r == rows - 2 else ""
        t = Text(f"{name:<5}{label:>4}┤", style="dim")
        for lv, v in zip(levels, snr):
            if lv is None:
                t.append("?" if r == 0 else " ", style="dim")
                continue
            if lv >= 2 * rows:
                t.append("▲" if r == rows - 1 else " ", style=_snr_style(v))
                continue
            if lv < 0:
                t.append("▼" if r == 0 else " ", style=_snr_style(v))
                continue
            half = int(lv)  # 0 .. 2*rows-1
            if half // 2 == r:
                t.append("▀" if half % 2 else "▄", style=_snr_style(v))
            else:
                t.append(" ")
        lines.append(t)
    # Bits strip.
    t = Text(f"{'bits':<5}{'':>4} ", style="dim")
    for b in bits:
        g, s = _shade(b)
        t.append(g, style=s)
    lines.append(t)
    # Power: signed bars around 0 dB (a full row is POWER_ROW_DB).
    up = Text(f"{'power':<5}{'+':>4}┤", style="dim")
    down = Text(f"{'dB':<5}{'-':>4}┤", style="dim")
    for p in power:
        if p is None:
            up.append(" ")
            down.append(" ")
            continue
        if p >= 0:
            eighths = min(8, max(1, int(round(p / POWER_ROW_DB * 8))))
            up.append(_LOWER[eighths], style="magenta" if p > 0.05 else "grey62")
            down.append(" ")
        else:
            eighths = min(8, int(round(-p / POWER_ROW_DB * 8)))
            up.append(" ")
            down.append("▔" if eighths <= 2 else "▀" if eighths <= 5 else "█", style="cyan")
    lines.extend([up, down])
    ticks, labels = _tone_ticks(cols_first, tone_last, plot_w)
    lines.append(Text(f"{'tone':<5}{'':>4}└" + ticks, style="dim"))
    lines.append(Text(" " * _GUTTER + labels, style="dim"))
    if not compact:
        parts = []
        p = Text("bits ", style="dim")
        for i, (low, g, sty) in enumerate(BIT_SHADES):
            nxt = BIT_SHADES[i + 1][0] - 1 if i + 1 < len(BIT_SHADES) else None
            p.append(g, style=sty)
            p.append(f"{low if nxt == low else f'{low}-{nxt}' if nxt is not None else f'{low}+'} ",
                     style="dim")
        parts.append(p)
        p = Text("SNR ", style="dim")
        p.append("▄▀", style="green")
        p.append(" column's lowest, ▲▼ off scale", style="dim")
        parts.append(p)
        parts.append(Text(f"power ▁█ up ▔▀ down from nominal, {POWER_ROW_DB:g} dB/row",
                          style="dim"))
        line = Text("legend  ", style="dim")
        for p in parts:
            if line.cell_len + p.cell_len + 3 > width and line.plain.strip() != "legend":
                lines.append(line)
                line = Text("        ")
            elif line.plain.strip() != "legend":
                line.append(" │ ", style="dim")
            line.append_text(p)
        lines.append(line)
    return [_fit(x, width) for x in lines]


# --------------------------------------------------------------------------- numbers


def _fmt(v: Any, spec: str, unit: str = "") -> str:
    if v is None:
        return "-"
    return f"{format(v, spec)}{unit}"


def _clock_text(ppm: Any) -> str:
    """`` sample clock +50.0 ppm`` for the source line ("" when the source measures none)."""
    if not isinstance(ppm, (int, float)) or isinstance(ppm, bool) or not math.isfinite(ppm):
        return ""
    return f" sample clock {ppm:+.1f} ppm"


def _mbit(v: Any) -> str:
    return "-" if v is None else f"{v / 1e6:.3f} Mbit/s"


def _seg(label: str, value: str, detail: str = "", *, wide: bool, style: str = "") -> Text:
    t = Text(label, style="dim")
    t.append(value, style=style)
    if detail and wide:
        t.append(f" {detail}", style="dim")
    return t


def _wrap(segments: list[Text], width: int, sep: str = "   ") -> list[Text]:
    """Pack ``segments`` into lines of at most ``width`` cells, breaking only between them."""
    lines: list[Text] = []
    line = Text()
    for seg in segments:
        if line.cell_len and line.cell_len + len(sep) + seg.cell_len > width:
            lines.append(line)
            line = Text()
        if line.cell_len:
            line.append(sep)
        line.append_text(seg)
    if line.cell_len:
        lines.append(line)
    return [_fit(x, width) for x in lines]


def _number_lines(status: Mapping[str, Any], tx: Mapping[str, Any] | None,
                  tx_endpoint: str | None, width: int,
                  tx_silent_s: float | None = None) -> list[Text]:
    wide = width >= 120
    rate = status.get("rate", {})
    data = rate.get("data_rate_bps")
    line = rate.get("line_rate_bps", rate.get("rate_bps"))
    how = (f"({rate.get('data_symbols')} data of {rate.get('symbols_per_frame')} symbols "
           f"x {_fmt(rate.get('frame_rate_hz'), 'g')} frames/s)" if data is not None
           else "(the source gives no frame rate)")
    segs = [_seg("data rate ", _mbit(data), how, wide=wide, style="bold"),
            _seg("line rate ", _mbit(line), "(every symbol as data)", wide=wide),
            _seg("", str(rate.get("bits_per_symbol", 0)), wide=wide).append(" bits/symbol",
                                                                            style="dim")]
    out = _wrap(segs, width)
    margin = status.get("margin") or {}
    head = margin.get("headroom_db", status.get("margin_db"))
    segs = [_seg("headroom ", _fmt(head, "+.2f", " dB"), "above the target", wide=wide,
                 style="bold"),
            _seg("target margin ", _fmt(margin.get("target_db"), ".2f", " dB"), wide=wide)]
    link = status.get("link")
    if link:
        segs += [_seg("goodput ", _mbit(link.get("goodput_bps")), wide=wide, style="bold"),
                 _seg("frame errors ", f"{link.get('frame_errors', 0)} of "
                      f"{link.get('frames', 0)} (FER {_fmt(link.get('frame_error_rate'), '.2g')})",
                      wide=wide),
                 _seg("bit errors ", f"BER {_fmt(link.get('bit_error_rate'), '.2g')}",
                      f"({link.get('bit_errors', 0)} of {link.get('bits', 0)})", wide=wide)]
    else:
        segs.append(Text("goodput, errors: [not known, the source cannot tell what was sent]",
                         style="italic dim"))
    out += _wrap(segs, width)
    if tx is not None:
        lag = tx.get("applied_lag_frames")
        segs = [_seg("tx ", str(tx.get("state", "-")), wide=wide, style="bold"),
                _seg("applied map ", str(tx.get("map_seq", "-")), wide=wide),
                _seg("lag ", "-" if lag is None else f"{lag} frames", wide=wide),
                _seg("power ", f"{_fmt(tx.get('power_db'), '+.1f')} dB", "", wide=wide)
                .append(f" (limit {_fmt(tx.get('max_total_db'), '+.1f')} dB)", style="dim"),
                _seg("peak tone ", f"{_fmt(tx.get('peak_tone_db'), '+.1f')} dB", wide=wide)
                .append(f" (limit {_fmt(tx.get('max_tone_db'), '+.1f')} dB)", style="dim"),
                _seg("clipped ", str(tx.get("power_clipped", 0)), "frames", wide=wide)]
        if tx_silent_s is not None and tx_silent_s > QUIET_AFTER_S:
            segs.append(Text(f"[no transmitter status for {tx_silent_s:.0f} s]",
                             style="bold yellow"))
        out += _wrap(segs, width)
    elif tx_endpoint:
        out.append(_fit(Text(f"tx [no transmitter status yet from {tx_endpoint}]",
                             style="italic yellow"), width))
    else:
        out.append(_fit(Text("tx [not watched: --tx-endpoint ADDRESS shows the applied map, "
                             "lag and power]", style="italic dim"), width))
    return out


def _change_lines(status: Mapping[str, Any], width: int, limit: int) -> list[Text]:
    changes = list(status.get("changes", []))[::-1]
    lines = [Text("latest maps (link time s, seq, kind, reason)", style="dim")]
    if not changes:
        lines.append(Text("  none yet", style="dim"))
    for c in changes[:max(0, limit - 1)]:
        kind = str(c.get("kind", ""))
        style = {"emergency": "bold red", "fallback": "bold yellow"}.get(kind, "")
        t = Text(f"{_fmt(c.get('time_s'), '6.1f')} {c.get('seq', ''):>4}  ")
        t.append(f"{kind:<10}", style=style)
        t.append(f" {c.get('reason', '')}")
        lines.append(t)
    return [_fit(x, width) for x in lines[:max(1, limit)]]


def _detail_lines(status: Mapping[str, Any], bad_messages: int | dict) -> list[Text]:
    fr = status.get("frames", {})
    rejected = dict(fr.get("rejected", {}))
    if fr.get("decode_errors"):
        rejected["decode"] = fr["decode_errors"]
    rej = ", ".join(f"{k} {v}" for k, v in sorted(rejected.items())) or "none"
    t = Text()
    t.append("frames ", style="dim").append(f"{fr.get('received', 0)} in, "
                                            f"{fr.get('accepted', 0)} used")
    t.append("  rejected ", style="dim").append(rej)
    t.append("  last frame ", style="dim").append(str(fr.get("last_frame", "-")))
    t.append("  estimate age ", style="dim").append(_fmt(status.get("estimate_age_s"), ".2f",
                                                         " s"))
    t.append("  epoch ", style="dim").append(str(status.get("epoch", "-")))
    out = [t]
    acks = status.get("acks", {})
    ack_txt = ", ".join(("" if k == "followers" else f"{k}: ")
                        + f"acked seq {v.get('seq')} ({_fmt(v.get('age_s'), '.1f', ' s')} ago)"
                        for k, v in acks.items()) or "no acknowledgements"
    out.append(Text("followers ", style="dim").append(ack_txt, style="default"))
    outer = status.get("outer")
    if outer:
        fer = outer.get("fer")
        fer_txt = "-" if fer is None else f"{100 * fer:.1f} % of {outer.get('window', 0)}"
        target = outer.get("target_fer")
        state = "on" if outer.get("active") else "off (no feedback)"
        out.append(Text("outer loop ", style="dim").append(
            f"{state}, offset {_fmt(outer.get('offset_db'), '+.2f', ' dB')}, frame errors "
            f"{fer_txt} (target {'-' if target is None else f'{100 * target:.1f} %'}, "
            f"{outer.get('outcomes', 0)} outcomes)", style="default"))
    dropped = {f"{sock} {reason}": n for sock, reasons in
               dict(status.get("protocol_errors") or {}).items()
               for reason, n in dict(reasons).items()}
    if isinstance(bad_messages, dict):
        n_bad = sum(bad_messages.values())
        why = ", ".join(f"{k} {v}" for k, v in sorted(bad_messages.items()))
    else:
        n_bad, why = int(bad_messages), ""
    if dropped or n_bad:
        t = Text()
        if dropped:
            t.append("daemon dropped " + ", ".join(f"{k} {v}" for k, v in
                                                   sorted(dropped.items())) + "   ",
                     style="yellow")
        if n_bad:
            t.append(f"{n_bad} undecodable status messages" + (f" ({why})" if why else ""),
                     style="yellow")
        out.append(t)
    return out


def _fit(text: Text, width: int) -> Text:
    if text.cell_len > width:
        text = text.copy()
        text.truncate(max(1, width - 1))
        text.append("…")
    return text


# --------------------------------------------------------------------------- the screen


def render(status: Mapping[str, Any] | None, *, endpoint: str = DEFAULT_STATUS_ENDPOINT,
           silent_s: float | None = None, bad_messages: int | dict = 0,
           width: int | None = None, height: int | None = None,
           alarms: Mapping[str, Mapping[str, Any]] | None = None,
           tx_status: Mapping[str, Any] | None = None, tx_endpoint: str | None = None,
           tx_silent_s: float | None = None,
           snr_scale_db: tuple[float, float] = DEFAULT_SNR_SCALE_DB):
    """Render one status message for a terminal of ``width`` x ``height`` cells.

    Parameters
    ----------
    status : mapping or None
        The latest status message; None when none has arrived.
    endpoint : str
        Where the view listens (shown when nothing arrives).
    silent_s : float or None
        Wall-clock seconds since the last message arrived (None: unknown). Above
        :data:`QUIET_AFTER_S` the view raises ``QUIET``.
    bad_messages : int or dict
        Messages that failed to decode: a count, or counts by reason.
    width, height : int, optional
        Screen size in cells (None: 100 wide, as tall as needed). What does not fit folds
        away, details first, then the latest maps, then the band picture shrinks; the alarms
        and the first line stay.
    alarms : mapping, optional
        The alarm memory (:func:`update_alarms`); None: built from this message alone.
    tx_status : mapping, optional
        The latest transmitter status (``brimline tx``), or None.
    tx_endpoint : str, optional
        The transmitter status endpoint watched (None: not watched).
    tx_silent_s : float, optional
        Wall-clock seconds since the transmitter's last status (above
        :data:`QUIET_AFTER_S` its figures are marked as old).
    snr_scale_db : (float, float)
        Fixed SNR scale of the band picture, dB.

    Returns
    -------
    rich.panel.Panel
    """
    total_w = 100 if width is None else max(40, int(width))
    inner_w = total_w - 4  # border and padding
    if status is None:
        waited = f" after {silent_s:.0f} s" if silent_s is not None else ""
        return Panel(Text(f"No status yet from {endpoint}{waited}.\n"
                          "Is the daemon running, and is status.endpoint the same address?",
                          style="bold yellow"),
                     title="brimline watch", border_style="yellow", width=total_w)
    book = alarms if alarms is not None else update_alarms(None, status)
    room = None if height is None else max(4, int(height) - 2)  # border lines
    alarm_lines = _alarm_lines(book, status, silent_s, inner_w,
                               max_lines=4 if room is None else max(1, min(4, room // 4)))
    drv = status.get("driver", {})
    m = status.get("map") or {}
    state = str(drv.get("state", "-"))
    head = _wrap([
        Text("t ", style="dim").append(_fmt(status.get("time_s"), ".1f", " s"), style="bold")
        .append(" link time", style="dim"),
        Text("source ", style="dim").append(f"{drv.get('name', '-')} ")
        .append(state, style="bold red" if state == "failed" else
                "bold yellow" if state == "reconnecting" else "bold green")
        .append(_clock_text(drv.get("clock_offset_ppm")), style="dim"),
        Text("map ", style="dim").append(f"seq {m.get('seq', '-')} {m.get('kind') or ''}"
                                         .rstrip())
        .append("" if m.get("effective_frame") is None
                else f" from frame {m['effective_frame']}", style="dim")], inner_w)
    top = alarm_lines + head
    if drv.get("error"):
        top.append(_fit(Text(f"source error: {drv['error']}", style="bold red"), inner_w))
    if tx_status is None and isinstance(status.get("transmitter"), dict):
        tx_status = status["transmitter"]  # the single-radio loopback's own transmitter
    numbers = _number_lines(status, tx_status, tx_endpoint, inner_w, tx_silent_s)
    details = [_fit(x, inner_w) for x in _detail_lines(status, bad_messages)]
    band = status.get("band", {})

    def picture(rows: int, compact: bool) -> list[Text]:
        return band_picture(band, width=inner_w, snr_scale_db=snr_scale_db, snr_rows=rows,
                            compact=compact)

    changes = _change_lines(status, inner_w, 9)
    if room is None:
        body = top + numbers + [Text("")] + picture(6, False) + [Text("")] + changes \
            + [Text("")] + details
    else:
        # Fold from the bottom: details, then maps, then the band shrinks and goes; the
        # alarms and the first line always stay (the alarms are capped above).
        left = room - len(top)
        body = top + numbers[:max(0, left)]
        left = max(0, left - len(numbers))
        # A tall band only when the maps and details fit too; else the band before the maps.
        shapes = [(r, False) for r in (10, 8, 5, 4, 3)] + [(3, True), (2, True)]
        tries = [(min(6, len(changes)) + len(details), 8), (min(3, len(changes)), 3), (0, 2)]
        pic: list[Text] = []
        for want, min_rows in tries:
            pic = next((p for p in (picture(r, c) for r, c in shapes if r >= min_rows)
                        if len(p) + want <= left), [])
            if pic:
                break
        body += pic
        left -= len(pic)
        more = _change_lines(status, inner_w, 17)
        n_maps = max(0, left - len(details)) if left - len(details) >= 2 else left
        shown = more[:n_maps] if n_maps >= 2 else []
        body += shown
        left -= len(shown)
        body += details[:left] if left >= len(details) else []
    out = Text("\n").join(body)
    return Panel(out, title="brimline watch", subtitle=endpoint, width=total_w,
                 border_style="red" if any(v.get("active") for v in book.values())
                 or (silent_s is not None and silent_s > QUIET_AFTER_S) else "green")


# --------------------------------------------------------------------------- the loop


def _sub_socket(ctx, socks: list, endpoint: str, server_key, client_key):
    """A SUB socket to ``endpoint``, put in ``socks`` (closed by the caller) before anything
    can fail."""
    sock = ctx.socket(zmq.SUB)
    socks.append(sock)
    sock.setsockopt(zmq.LINGER, 0)
    sock.setsockopt(zmq.RCVHWM, 4)
    limit_inbound(sock, codec.max_frame_bytes())
    if server_key is not None:
        try:
            apply_client(sock, server_key_file=server_key, client_secret_file=client_key)
        except zmq.ZMQError as exc:
            raise InputError(f"CURVE keys refused by ZeroMQ: {exc}") from None
    sock.setsockopt(zmq.SUBSCRIBE, b"")
    sock.connect(endpoint)
    return sock


def _drain(sock, drops: DropCounter, name: str):
    """Decoded dict messages waiting on ``sock`` (at most 256: a flood cannot stall redraws)."""
    for _ in range(256):
        try:
            frames = sock.recv_multipart(zmq.NOBLOCK, copy=False)
        except zmq.Again:
            return
        try:
            _topic, record = codec.decode(frames, types={"dict"})
        except ProtocolError as exc:
            drops.drop(name, exc.reason, str(exc))
            continue
        if isinstance(record, dict):
            yield record


def watch(endpoint: str = DEFAULT_STATUS_ENDPOINT, *, once: bool = False,
          duration_s: float | None = None, out: TextIO | None = None,
          clock: Callable[[], float] = time.monotonic, context=None,
          curve_server_key: str | Path | None = None,
          curve_client_key: str | Path | None = None,
          drops: DropCounter | None = None, tx_endpoint: str | None = None,
          snr_scale_db: tuple[float, float] = DEFAULT_SNR_SCALE_DB,
          clear_after_s: float = DEFAULT_CLEAR_AFTER_S) -> int:
    """Show the status stream at ``endpoint`` until interrupted or ``duration_s`` elapses.

    Parameters
    ----------
    endpoint : str
        Status endpoint of the daemon (a ZeroMQ address).
    once : bool
        Show the first status message and return (waits up to ``duration_s``, default 5 s).
    duration_s : float or None
        Stop after this many seconds.
    out : text stream, optional
        Where to draw (default standard output). A stream that is not a terminal gets plain
        lines, one per status message.
    clock : callable
        Monotonic clock, s.
    context : zmq.Context, optional
        Context to use (default: a private one).
    curve_server_key : str or Path, optional
        The daemon's public ``.key`` file; with ``curve_client_key`` turns CURVE on (for the
        transmitter's status too).
    curve_client_key : str or Path, optional
        This watcher's ``.key_secret`` file.
    drops : DropCounter, optional
        Where malformed messages are counted (sockets ``status`` and ``tx_status``, by
        reason); a private one by default.
    tx_endpoint : str, optional
        A transmitter's status endpoint (``tx.status_endpoint``) to show beside the daemon's.
    snr_scale_db : (float, float)
        Fixed SNR scale of the band picture, dB.
    clear_after_s : float
        Link time an alarm must be absent to be cleared from the top, s.

    Returns
    -------
    int
        0, or 1 when ``once`` was asked and no status arrived in time.

    Raises
    ------
    InputError
        When only one of the two key files is given, or a key file is unusable.
    """
    if (curve_server_key is None) != (curve_client_key is None):
        raise InputError("CURVE needs both the daemon's public key and this watcher's "
                         "secret key")
    drops = DropCounter(log, clock=clock) if drops is None else drops
    out = sys.stdout if out is None else out
    tty = bool(getattr(out, "isatty", lambda: False)())
    console = Console(file=out, force_terminal=tty or None, soft_wrap=False)
    if once and duration_s is None:
        duration_s = 5.0
    own_ctx = context is None
    ctx = zmq.Context() if own_ctx else context
    socks = []
    status: dict | None = None
    tx_status: dict | None = None
    tx_last: float | None = None
    book: dict = {}
    start = last = clock()
    announced_missing = False
    live = None

    def screen():
        size = console.size
        return render(status, endpoint=endpoint, silent_s=clock() - last,
                      bad_messages=drops.counts().get("status", {}), width=size.width,
                      height=size.height if live is not None else None, alarms=book,
                      tx_status=tx_status, tx_endpoint=tx_endpoint,
                      tx_silent_s=None if tx_last is None else clock() - tx_last,
                      snr_scale_db=snr_scale_db)

    try:
        sock = _sub_socket(ctx, socks, endpoint, curve_server_key, curve_client_key)
        tx_sock = None
        if tx_endpoint is not None:
            tx_sock = _sub_socket(ctx, socks, tx_endpoint, curve_server_key, curve_client_key)
        poller = zmq.Poller()
        for s in socks:
            poller.register(s, zmq.POLLIN)
        if tty and not once:
            live = Live(render(None, endpoint=endpoint, silent_s=0.0), console=console,
                        refresh_per_second=4, transient=False, screen=False)
            live.start()
        while True:
            now = clock()
            if duration_s is not None and now - start >= duration_s:
                break
            ready = dict(poller.poll(250))
            if tx_sock is not None and tx_sock in ready:
                for record in _drain(tx_sock, drops, "tx_status"):
                    if record.get("type") == TX_STATUS_TYPE:
                        tx_status, tx_last = record, clock()
            if sock in ready:
                for record in _drain(sock, drops, "status"):
                    if record.get("type") == TX_STATUS_TYPE:
                        # a transmitter's status on the main endpoint (brimline tx): one plain
                        # line each, and no daemon panel or "no status yet" for a stream that
                        # has none
                        announced_missing = True
                        if live is not None and status is None:
                            live.stop()
                            live = None
                        print(tx_summary_line(record), file=out, flush=True)
                        if once:
                            return 0
                        continue
                    if record.get("type") == "status":
                        status, last = record, clock()
                        book = update_alarms(book, status, clear_after_s=clear_after_s)
                        if not tty or once:
                            if once:
                                console.print(render(status, endpoint=endpoint,
                                                     width=console.width, alarms=book,
                                                     tx_status=tx_status,
                                                     tx_endpoint=tx_endpoint,
                                                     snr_scale_db=snr_scale_db))
                            else:
                                print(summary_line(status), file=out, flush=True)
                if once and status is not None:
                    return 0
            if live is not None:
                live.update(screen())
            elif status is None and not announced_missing and clock() - start > 2.0 and not once:
                print(f"no status yet from {endpoint} (is the daemon running?)", file=out,
                      flush=True)
                announced_missing = True
        if once and status is None:
            print(f"no status from {endpoint} within {duration_s:g} s "
                  "(is the daemon running?)", file=out, flush=True)
            return 1
        return 0
    except (KeyboardInterrupt, BrokenPipeError):  # Ctrl-C, or a pager/head that closed
        return 0
    finally:
        if live is not None:
            live.stop()
        for s in socks:
            s.close(linger=0)
        if own_ctx:
            ctx.term()
