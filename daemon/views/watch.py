"""Live terminal view of a daemon's status stream (``brimline watch``).

:func:`render` is pure: a status dict (or None) in, a ``rich`` renderable out, so the screen can
be tested without a terminal. :func:`watch` subscribes to the status endpoint and redraws with
``rich.live.Live`` on a terminal, or prints one plain line per status message when standard
output is not a terminal (pipes, logs, CI).

The watcher's SUB socket refuses frames above the codec's 1 MiB frame bound and decodes only
plain dict messages; anything else is dropped and counted by reason (shown under the alarms).
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
from rich.console import Console, Group
from rich.panel import Panel
from rich.table import Table
from rich.text import Text

from brimline.daemon.errors import InputError, ProtocolError
from brimline.daemon.net.curve import apply_client
from brimline.daemon.net.drops import DropCounter, limit_inbound
from brimline.daemon.runtime.status import ALARMS, band_columns, summary_line
from brimline.daemon.runtime.transmitter import TX_STATUS_TYPE, tx_summary_line
from brimline.daemon.wire import codec

__all__ = ["render", "band_chart", "watch", "DEFAULT_STATUS_ENDPOINT"]

DEFAULT_STATUS_ENDPOINT = "tcp://127.0.0.1:7343"

log = logging.getLogger("brimline.watch")

_EIGHTHS = " ▁▂▃▄▅▆▇█"
# Bits 0..15 as one glyph each: '·' for an unloaded tone, then hex digits.
_BIT_GLYPHS = "·123456789abcdef"
_BIT_STYLES = ["grey39", "red", "dark_orange", "yellow", "gold1", "chartreuse3", "green3",
               "spring_green2", "cyan", "deep_sky_blue1", "blue_violet", "magenta",
               "magenta", "magenta", "magenta", "magenta"]


def band_chart(snr_db: list, bits: list, power_db: list | None = None, *, height: int = 6,
               max_columns: int | None = None) -> Text:
    """Columns of block characters for per-group SNR, with a row of bits underneath.

    Parameters
    ----------
    snr_db : list of float or None
        Lowest SNR of each tone group, dB (None where unknown).
    bits : list of float or None
        Mean bits of each tone group.
    power_db : list of float or None, optional
        Mean power of each group relative to nominal, dB: a row of ``-`` (below -1 dB), ``=``
        (within 1 dB of nominal), ``+`` (above +1 dB) and blanks (unloaded).
    height : int
        Rows of the SNR columns.
    max_columns : int, optional
        Regroup to at most this many columns (lowest SNR, mean bits) to fit a narrow screen.

    Returns
    -------
    rich.text.Text
    """
    power_db = list(power_db or [])
    if max_columns is not None:
        snr_db = _regroup(snr_db, max_columns, "min")
        bits = _regroup(bits, max_columns, "mean")
        power_db = _regroup(power_db, max_columns, "mean")
    text = Text()
    vals = [v for v in snr_db if v is not None and math.isfinite(v)]
    if vals:
        lo = min(0.0, min(vals))
        hi = max(lo + 1.0, max(vals))
        text.append(f"SNR dB  {hi:6.1f} ┐\n", style="dim")
        levels = [None if (v is None or not math.isfinite(v))
                  else (v - lo) / (hi - lo) * height * 8 for v in snr_db]
        for row in range(height - 1, -1, -1):
            text.append("        ")
            for lv in levels:
                if lv is None:
                    text.append("?", style="dim")
                    continue
                fill = int(round(min(max(lv - row * 8, 0), 8)))
                text.append(_EIGHTHS[fill], style=_snr_style(lv / (height * 8) * (hi - lo) + lo))
            text.append("\n")
        text.append(f"        {lo:6.1f} ┘\n", style="dim")
    else:
        text.append("SNR dB  (no estimate yet)\n", style="dim")
    if bits:
        text.append("bits    ")
        for b in bits:
            if b is None:
                text.append("?", style="dim")
                continue
            k = int(min(max(round(b), 0), 15))
            text.append(_BIT_GLYPHS[k], style=_BIT_STYLES[k])
        text.append("\n")
    if power_db:
        text.append("power   ")
        for p in power_db:
            if p is None:
                text.append(" ")
            elif p < -1.0:
                text.append("-", style="cyan")
            elif p > 1.0:
                text.append("+", style="magenta")
            else:
                text.append("=", style="dim")
        text.append("\n")
    return text


def _regroup(values: list, columns: int, how: str) -> list:
    if len(values) <= columns:
        return values
    arr = np.array([np.nan if v is None else v for v in values], dtype=np.float64)
    return [None if not math.isfinite(v) else float(v)
            for v in band_columns(arr, max(1, columns), how)]


def _snr_style(snr_db: float) -> str:
    if snr_db < 6:
        return "red"
    if snr_db < 15:
        return "yellow"
    return "green"


def _fmt(v: Any, spec: str, unit: str = "") -> str:
    if v is None:
        return "-"
    return f"{format(v, spec)}{unit}"


def render(status: Mapping[str, Any] | None, *, endpoint: str = DEFAULT_STATUS_ENDPOINT,
           silent_s: float | None = None, bad_messages: int | dict = 0,
           width: int | None = None):
    """Render one status message for a terminal.

    Parameters
    ----------
    status : mapping or None
        The latest status message; None when none has arrived.
    endpoint : str
        Where the view listens (shown when nothing arrives).
    silent_s : float or None
        Seconds since the last message arrived (None: unknown). Above a few seconds the view says
        the daemon has gone quiet.
    bad_messages : int or dict
        Messages that failed to decode: a count, or counts by reason.
    width : int, optional
        Screen width in characters; the band chart is regrouped to fit it.

    Returns
    -------
    rich renderable
    """
    if status is None:
        waited = f" after {silent_s:.0f} s" if silent_s is not None else ""
        return Panel(Text(f"No status yet from {endpoint}{waited}.\n"
                          "Is the daemon running, and is status.endpoint the same address?",
                          style="bold yellow"),
                     title="brimline watch", border_style="yellow")

    drv = status.get("driver", {})
    fr = status.get("frames", {})
    m = status.get("map") or {}
    rate = status.get("rate", {})
    band = status.get("band", {})
    alarms = list(status.get("alarms", []))
    if silent_s is not None and silent_s > 3.0:
        alarms.append("quiet")

    head = Text()
    head.append("epoch ", style="dim").append(str(status.get("epoch", "-")))
    head.append("   source ", style="dim").append(f"{drv.get('name', '-')} ")
    state = str(drv.get("state", "-"))
    head.append(state, style="bold red" if state == "failed" else
                "bold yellow" if state == "reconnecting" else "bold green")
    head.append("   t ", style="dim").append(_fmt(status.get("time_s"), ".1f", " s"))
    if drv.get("error"):
        head.append(f"\nsource error: {drv['error']}", style="bold red")

    figures = Table.grid(padding=(0, 2))
    figures.add_column(style="dim", justify="right")
    figures.add_column()
    figures.add_column(style="dim", justify="right")
    figures.add_column()
    rejected = dict(fr.get("rejected", {}))
    if fr.get("decode_errors"):
        rejected["decode"] = fr["decode_errors"]
    rej_txt = ", ".join(f"{k} {v}" for k, v in sorted(rejected.items())) or "none"
    rbps = rate.get("rate_bps")
    figures.add_row("frames", f"{fr.get('received', 0)} in, {fr.get('accepted', 0)} used",
                    "rejected", rej_txt)
    figures.add_row("estimate age", _fmt(status.get("estimate_age_s"), ".2f", " s"),
                    "last frame", str(fr.get("last_frame", "-")))
    figures.add_row("bits/symbol", str(rate.get("bits_per_symbol", 0)),
                    "rate", "-" if rbps is None else f"{rbps / 1e6:.3f} Mbit/s")
    figures.add_row("margin", _fmt(status.get("margin_db"), "+.1f", " dB"),
                    "map", f"seq {m.get('seq', '-')}  {m.get('kind') or ''}".rstrip())
    link = status.get("link")
    if link:
        gp = link.get("goodput_bps")
        figures.add_row("goodput", "-" if gp is None else f"{gp / 1e6:.3f} Mbit/s",
                        "errors", f"FER {_fmt(link.get('frame_error_rate'), '.2g')}  "
                                  f"BER {_fmt(link.get('bit_error_rate'), '.2g')}  "
                                  f"({link.get('frame_errors', 0)} of "
                                  f"{link.get('frames', 0)} frames)")
    acks = status.get("acks", {})
    ack_txt = ", ".join(("" if k == "followers" else f"{k}: ")
                        + f"acked seq {v.get('seq')} ({_fmt(v.get('age_s'), '.1f', ' s')} ago)"
                        for k, v in acks.items()) or "no acknowledgements"
    figures.add_row("followers", ack_txt, "tones",
                    f"{band.get('tones', 0)} ({band.get('tone_first', '-')}.."
                    f"{band.get('tone_last', '-')})")

    outer = status.get("outer")
    if outer:
        fer = outer.get("fer")
        fer_txt = "-" if fer is None else f"{100 * fer:.1f} % of {outer.get('window', 0)}"
        target = outer.get("target_fer")
        state = "on" if outer.get("active") else "off (no feedback)"
        figures.add_row("outer loop", f"{state}, offset "
                        f"{_fmt(outer.get('offset_db'), '+.2f', ' dB')}",
                        "frame errors", f"{fer_txt} (target "
                        f"{'-' if target is None else f'{100 * target:.1f} %'}, "
                        f"{outer.get('outcomes', 0)} outcomes)")

    chart = band_chart(list(band.get("snr_db", [])), list(band.get("bits", [])),
                       list(band.get("power_db", [])), max_columns=None if width is None else max(8, width - 14))

    history = Table(box=None, show_header=True, header_style="dim", pad_edge=False)
    history.add_column("t s", justify="right")
    history.add_column("seq", justify="right")
    history.add_column("kind")
    history.add_column("reason", overflow="fold")
    for c in list(status.get("changes", []))[-8:][::-1]:
        kind = str(c.get("kind", ""))
        style = {"emergency": "bold red", "fallback": "bold yellow"}.get(kind, "")
        history.add_row(_fmt(c.get("time_s"), ".1f"), str(c.get("seq", "")),
                        Text(kind, style=style), str(c.get("reason", "")))

    alarm_text = Text()
    if alarms:
        for a in alarms:
            alarm_text.append(f" {a.upper()} ", style="bold white on red")
            alarm_text.append(f" {ALARMS.get(a, 'no status for over 3 s') }  ")
    else:
        alarm_text.append("no alarms", style="green")
    dropped = {f"{sock} {reason}": n for sock, reasons in
               dict(status.get("protocol_errors") or {}).items()
               for reason, n in dict(reasons).items()}
    if dropped:
        alarm_text.append("   daemon dropped " + ", ".join(
            f"{k} {v}" for k, v in sorted(dropped.items())), style="yellow")
    if isinstance(bad_messages, dict):
        n_bad = sum(bad_messages.values())
        why = ", ".join(f"{k} {v}" for k, v in sorted(bad_messages.items()))
    else:
        n_bad, why = int(bad_messages), ""
    if n_bad:
        alarm_text.append(f"   {n_bad} undecodable status messages"
                          + (f" ({why})" if why else ""), style="yellow")

    parts = [head, Text(""), figures, Text(""), chart, Text("recent changes", style="dim"),
             history, Text(""), alarm_text]
    transmitter = status.get("transmitter")
    if isinstance(transmitter, dict):  # the single-radio loopback's transmitter
        line = tx_summary_line(transmitter)
        if transmitter.get("error"):
            line += f": {transmitter['error']}"
        parts[3:3] = [Text(line, style="yellow" if "transmitter_down" in alarms else ""),
                      Text("")]
    body = Group(*parts)
    return Panel(body, title="brimline watch", subtitle=endpoint,
                 border_style="red" if alarms else "green")


def watch(endpoint: str = DEFAULT_STATUS_ENDPOINT, *, once: bool = False,
          duration_s: float | None = None, out: TextIO | None = None,
          clock: Callable[[], float] = time.monotonic, context=None,
          curve_server_key: str | Path | None = None,
          curve_client_key: str | Path | None = None,
          drops: DropCounter | None = None) -> int:
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
        The daemon's public ``.key`` file; with ``curve_client_key`` turns CURVE on.
    curve_client_key : str or Path, optional
        This watcher's ``.key_secret`` file.
    drops : DropCounter, optional
        Where malformed messages are counted (socket ``status``, by reason); a private one
        by default.

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
    sock = ctx.socket(zmq.SUB)
    status: dict | None = None
    start = last = clock()
    announced_missing = False
    live = None
    try:
        sock.setsockopt(zmq.LINGER, 0)
        sock.setsockopt(zmq.RCVHWM, 4)
        limit_inbound(sock, codec.max_frame_bytes())
        if curve_server_key is not None:
            try:
                apply_client(sock, server_key_file=curve_server_key,
                             client_secret_file=curve_client_key)
            except zmq.ZMQError as exc:
                raise InputError(f"CURVE keys refused by ZeroMQ: {exc}") from None
        sock.setsockopt(zmq.SUBSCRIBE, b"")
        sock.connect(endpoint)
        if tty and not once:
            from rich.live import Live

            live = Live(render(None, endpoint=endpoint, silent_s=0.0), console=console,
                        refresh_per_second=4, transient=False)
            live.start()
        while True:
            now = clock()
            if duration_s is not None and now - start >= duration_s:
                break
            if sock.poll(250, zmq.POLLIN):
                for _ in range(256):  # bounded: a flood cannot keep the view from redrawing
                    try:
                        frames = sock.recv_multipart(zmq.NOBLOCK, copy=False)
                    except zmq.Again:
                        break
                    try:
                        _topic, record = codec.decode(frames, types={"dict"})
                    except ProtocolError as exc:
                        drops.drop("status", exc.reason, str(exc))
                        continue
                    if isinstance(record, dict) and record.get("type") == TX_STATUS_TYPE:
                        # a transmitter's status (brimline tx): one plain line each, and no
                        # daemon panel or "no status yet" for a stream that has none
                        announced_missing = True
                        if live is not None and status is None:
                            live.stop()
                            live = None
                        print(tx_summary_line(record), file=out, flush=True)
                        if once:
                            return 0
                        continue
                    if isinstance(record, dict) and record.get("type") == "status":
                        status, last = record, clock()
                        if not tty or once:
                            if once:
                                console.print(render(status, endpoint=endpoint,
                                                     width=console.width))
                            else:
                                print(summary_line(status), file=out, flush=True)
                if once and status is not None:
                    return 0
            silent = clock() - last
            if live is not None:
                live.update(render(status, endpoint=endpoint, silent_s=silent,
                                   bad_messages=drops.counts().get("status", {}),
                                   width=console.width))
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
        sock.close(linger=0)
        if own_ctx:
            ctx.term()
