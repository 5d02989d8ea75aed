"""The operators' status message: a plain, JSON-safe dict built from the service's state.

Everything here is a pure function of its arguments (no clocks, no sockets), so the message a
daemon sends can be rebuilt and checked in a test. The service calls :func:`build_status` at the
configured period and hands the dict to the protocol's status publisher; ``brimline watch`` reads
the same dict back and renders it.

Layout of the message (version 1)::

    {"type": "status", "version": 1, "time_s": ..., "epoch": "...",
     "driver": {"name", "state", "error", "counters", "clock_offset_ppm"},
     "frames": {"received", "accepted", "rejected": {reason: n}, "decode_errors", "last_frame",
                "tracking": {counter: n}},   # estimator's tone outliers, jumps, resets
     "estimate_age_s": float | None,
     "band": {"tone_first", "tone_last", "tones", "columns", "tones_per_column",
              "tone_index": [...], "snr_db": [...], "bits": [...], "power_db": [...]},
     "rate": {"bits_per_symbol", "data_rate_bps", "line_rate_bps", "rate_bps",
              "frame_rate_hz", "data_symbols", "symbols_per_frame"},
     "margin": {"headroom_db", "target_db"},
     "margin_db": float | None,     # the same as margin.headroom_db (kept for older readers)
     "map": {"seq", "reason", "kind", "fallback", "effective_frame", "created_s"} | None,
     "maps_published": {kind: n},
     "changes": [{"time_s", "kind", "reason", "seq"}, ...],   # newest last
     "acks": {follower: {"seq", "age_s"}},
     "recording": {"state": "off" | "on" | "failed", "path", "error"},
     "protocol_errors": {socket: {reason: n}},   # malformed or forged messages dropped
     "link": {"frames", "frame_errors", "frame_error_rate", "bits", "bit_errors",
              "bit_error_rate", "goodput_bps", "link_time_s"} | None,   # closed loop only
     "outer": {"active", "offset_db", "fer", "window", "target_fer", "outcomes", "errored",
               "repeated", "went_off", "dropped": {reason: n}} | None,   # outer margin loop
     "transmitter": {...} | None,   # single-radio loopback: the transmitter's own status
     "alarms": ["stale", "fallback", "emergency", "driver_failed", ...]}

The band is compact: the data tones, in the one tone numbering used everywhere (the signed FFT
bins of the tone plan's ``data_tones``, as in maps, estimates, logs and ``brimline plan``), are
grouped into at most ``columns`` (256) groups of ``tones_per_column`` adjacent data tones each
(whole tones; only the last group may hold fewer), so with up to 256 data tones every group is
one tone. ``tone_index`` holds each group's first tone. Each group shows its *lowest* SNR (what
limits loading), its mean bits and its mean power relative to nominal, rounded to 0.1.
Non-finite numbers become ``None`` so the message is strict JSON.

Two rates are given and named apart. ``data_rate_bps`` counts the data symbols only: bits per
data symbol of the map in force x ``data_symbols`` per frame x ``frame_rate_hz`` (frame slots
per second; sync, training and header symbols, pilot tones, cyclic prefixes and the silent gap
between frames carry no data). It is None when the source does not know its frame rate.
``line_rate_bps`` (also under its old name ``rate_bps``) is bits per symbol x OFDM symbols per
second (``sample_rate_hz / (fft_size + cp_len)``): the rate if every symbol time carried data at
this map, an upper bound, not what the link delivers. The payload's 32-bit CRC is part of the
data symbols. ``goodput_bps`` (``link``) is what was delivered.

Two margins are given and named apart: ``margin.target_db`` is the target noise margin the
loader adds to the gap (``loading.margin_db``); ``margin.headroom_db`` is the achieved headroom
of the map in force beyond that target (how far every loaded tone's required power could still
grow within budget and ceilings; the map's ``margin_db``).

The ``link`` block is there when the source knows what was sent (the simulator): payload frames
sent, those not delivered (payload CRC failed or frame lost), the frame error rate, payload bits
demodulated and wrong ones, the bit error rate, and the goodput (data bits of delivered frames
per second of link time); see :class:`~brimline.drivers.link.receiver.LinkTally`.

The ``transmitter`` block is there in the single-radio loopback (``driver.radio.transmit``): the
status dict of its transmitter loop, as ``brimline tx`` publishes it (``type: tx_status``;
:meth:`~brimline.daemon.runtime.transmitter.TxLoop.status`), with ``error`` when it stopped.
"""

from __future__ import annotations

import math
import warnings
from typing import Any, Mapping, Sequence

import numpy as np

from brimline.daemon.core.controller import Change, LinkController

__all__ = ["STATUS_VERSION", "ALARMS", "band_columns", "tone_columns", "build_status",
           "controller_fields", "driver_fields", "frame_fields", "finite", "summary_line",
           "link_text", "rate_text"]

STATUS_VERSION = 1

#: Alarms the status can raise, with the operator's one-line meaning.
ALARMS = {
    "stale": "no valid estimate within fallback.stale_after_s",
    "fallback": "the safe fallback map is in force",
    "emergency": "the last change was an emergency rate reduction",
    "driver_failed": "the estimate source stopped with an error",
    "driver_reconnecting": "the radio is being reopened after a fault (no estimates meanwhile)",
    "no_map": "no map has been published yet",
    "state_unsaved": "the state file cannot be written: new maps are held back",
    "recording_failed": "the recording cannot be written: it stopped, the maps go on",
    "transmitter_down": "the loopback transmitter's radio is being rebuilt, or it stopped",
}


def finite(value: Any, ndigits: int = 3) -> float | None:
    """``value`` rounded to ``ndigits``, or None when it is None, NaN or infinite."""
    if value is None:
        return None
    value = float(value)
    return round(value, ndigits) if math.isfinite(value) else None


def _rounded_list(values: np.ndarray) -> list:
    out = np.round(np.asarray(values, dtype=np.float64), 1)
    return [float(v) if math.isfinite(v) else None for v in out]


def band_columns(values: np.ndarray, columns: int, how: str) -> np.ndarray:
    """Group per-tone ``values`` into at most ``columns`` adjacent groups.

    Parameters
    ----------
    values : ndarray, shape (N,)
        Per-tone values in tone order.
    columns : int
        Largest number of groups (>= 1).
    how : {"min", "mean"}
        Reduction inside a group; NaN entries are ignored (a group of only NaN gives NaN).

    Returns
    -------
    ndarray of float64, shape (min(N, columns),)
    """
    v = np.asarray(values, dtype=np.float64)
    n = v.size
    if n == 0:
        return v
    k = min(n, max(1, int(columns)))
    edges = np.linspace(0, n, k + 1).round().astype(np.intp)
    # Pad groups to equal width with NaN so one vectorised nan-reduction does them all.
    width = int(np.max(np.diff(edges)))
    idx = edges[:-1, None] + np.arange(width)[None, :]
    mask = idx < edges[1:, None]
    grid = np.where(mask, v[np.minimum(idx, n - 1)], np.nan)
    if how not in ("min", "mean"):
        raise ValueError(f"how={how!r} must be 'min' or 'mean'")
    with warnings.catch_warnings():  # groups of only NaN give NaN without a warning
        warnings.simplefilter("ignore", RuntimeWarning)
        return np.nanmin(grid, axis=1) if how == "min" else np.nanmean(grid, axis=1)


def tone_columns(values: np.ndarray, tones_per_column: int, how: str) -> np.ndarray:
    """Group per-tone ``values`` into groups of ``tones_per_column`` whole adjacent tones.

    Parameters
    ----------
    values : ndarray, shape (N,)
        Per-tone values in tone order.
    tones_per_column : int
        Tones per group (>= 1); only the last group may hold fewer.
    how : {"min", "mean"}
        Reduction inside a group; NaN entries are ignored (a group of only NaN gives NaN).

    Returns
    -------
    ndarray of float64, shape (ceil(N / tones_per_column),)
    """
    v = np.asarray(values, dtype=np.float64)
    per = max(1, int(tones_per_column))
    if how not in ("min", "mean"):
        raise ValueError(f"how={how!r} must be 'min' or 'mean'")
    if v.size == 0:
        return v
    k = -(-v.size // per)
    grid = np.full(k * per, np.nan)
    grid[:v.size] = v
    grid = grid.reshape(k, per)
    with warnings.catch_warnings():  # groups of only NaN give NaN without a warning
        warnings.simplefilter("ignore", RuntimeWarning)
        return np.nanmin(grid, axis=1) if how == "min" else np.nanmean(grid, axis=1)


def frame_fields(plan) -> dict[str, Any]:
    """The :func:`build_status` arguments a tone plan gives: ``symbol_rate_hz`` and, for a
    plan with a frame layout (a ``LinkPlan``), ``data_symbols`` and ``symbols_per_frame``."""
    out: dict[str, Any] = {"symbol_rate_hz": plan.sample_rate_hz / plan.symbol_len}
    if hasattr(plan, "data_symbols") and hasattr(plan, "n_symbols"):
        out.update(data_symbols=int(plan.data_symbols), symbols_per_frame=int(plan.n_symbols))
    return out


def build_status(*, time_s: float, epoch: str, driver: Mapping[str, Any],
                 frames: Mapping[str, Any], estimate_age_s: float | None,
                 tone_index: np.ndarray | None, snr_db: np.ndarray | None,
                 current_map=None, current_kind: str | None = None,
                 maps_published: Mapping[str, int] | None = None,
                 changes: Sequence[Change] = (), acks: Mapping[str, Mapping] | None = None,
                 stale: bool = False, symbol_rate_hz: float | None = None,
                 columns: int = 256, state_unsaved: bool = False,
                 recording: Mapping[str, Any] | None = None,
                 protocol_errors: Mapping[str, Mapping[str, int]] | None = None,
                 link: Mapping[str, Any] | None = None,
                 outer: Mapping[str, Any] | None = None,
                 frame_rate_hz: float | None = None, data_symbols: int | None = None,
                 symbols_per_frame: int | None = None,
                 target_margin_db: float | None = None,
                 transmitter: Mapping[str, Any] | None = None) -> dict:
    """Build the status message (see the module docstring for its layout).

    Parameters
    ----------
    time_s : float
        Core time of the message, s.
    epoch : str
        Daemon epoch.
    driver : mapping
        ``name``, ``state`` ("starting", "running", "reconnecting", "ended", "failed"),
        ``error`` (str or None)
        and ``counters`` (mapping reason -> count) of the estimate source; optionally
        ``clock_offset_ppm`` (the radio's sample clock offset, ppm, or None).
    frames : mapping
        ``received``, ``accepted``, ``rejected`` (mapping reason -> count), ``decode_errors``,
        ``last_frame`` and optionally ``tracking`` (estimator counters that are not frame
        rejections: tone outliers held back, confirmed jumps, resets).
    estimate_age_s : float or None
        Age of the newest accepted estimate, s (None before the first).
    tone_index, snr_db : ndarray or None
        Data tones and tracked per-tone SNR in dB (None before the first estimate).
    current_map : LoadMap or None
        The map in force (last published).
    current_kind : str or None
        Decision kind that produced ``current_map``.
    maps_published : mapping, optional
        Maps published so far by decision kind.
    changes : sequence of Change
        Recent changes, oldest first (the caller bounds the length).
    acks : mapping, optional
        Per follower: ``seq`` last acknowledged and ``age_s`` since its acknowledgement.
    stale : bool
        Whether estimates are stale (no valid estimate within the configured time).
    symbol_rate_hz : float or None
        OFDM symbols per second (sample rate / (FFT size + CP)); gives ``line_rate_bps``.
    columns : int
        Largest number of band groups (each of whole tones).
    state_unsaved : bool
        The daemon could not save its state (sequence-number lease): alarm ``state_unsaved``;
        no new map is sent until a save succeeds.
    recording : mapping, optional
        ``state`` ("off", "on", "failed"), ``path`` and ``error`` of the recording; "failed"
        raises the alarm ``recording_failed``.
    protocol_errors : mapping, optional
        Messages the daemon's sockets dropped, by socket (``acks``, ``snapshots``) and reason
        (a codec reason, ``forged``, ``request``).
    link : mapping, optional
        The closed loop's counts (``LinkTally.summary()``); None where the source cannot know
        what was sent.
    outer : mapping, optional
        The outer margin loop's status (:meth:`LinkController.outer_status`); None without
        an outer loop.
    frame_rate_hz : float or None
        Frame slots per second of the link (None: unknown); with ``data_symbols`` gives
        ``data_rate_bps``.
    data_symbols, symbols_per_frame : int or None
        Data symbols per frame and all symbols per frame (sync, training, header, data).
    target_margin_db : float or None
        The loader's target noise margin (``loading.margin_db``), dB.
    transmitter : mapping, optional
        The single-radio loopback transmitter's status dict; None without one.

    Returns
    -------
    dict
        JSON-safe status message.
    """
    m = current_map
    band: dict[str, Any] = {"tone_first": None, "tone_last": None, "tones": 0, "columns": 0,
                            "tones_per_column": 1, "tone_index": [], "snr_db": [], "bits": [],
                            "power_db": []}
    tones = None
    if m is not None:
        tones = np.asarray(m.tone_index)
    elif tone_index is not None:
        tones = np.asarray(tone_index)
    if tones is not None and tones.size:
        per = -(-int(tones.size) // max(1, int(columns)))
        band.update(tone_first=int(tones[0]), tone_last=int(tones[-1]), tones=int(tones.size),
                    tones_per_column=per, tone_index=[int(t) for t in tones[::per]])
        if snr_db is not None and np.asarray(snr_db).size == tones.size:
            band["snr_db"] = _rounded_list(tone_columns(snr_db, per, "min"))
        if m is not None:
            band["bits"] = _rounded_list(tone_columns(m.bits, per, "mean"))
            with np.errstate(divide="ignore"):
                p_db = 10.0 * np.log10(np.asarray(m.power_lin, dtype=np.float64))
            p_db[~np.isfinite(p_db)] = np.nan
            band["power_db"] = _rounded_list(tone_columns(p_db, per, "mean"))
        band["columns"] = len(band["tone_index"])

    alarms = []
    if stale:
        alarms.append("stale")
    if m is not None and m.fallback:
        alarms.append("fallback")
    if current_kind == "emergency":
        alarms.append("emergency")
    if driver.get("state") == "failed":
        alarms.append("driver_failed")
    if driver.get("state") == "reconnecting":
        alarms.append("driver_reconnecting")
    if m is None:
        alarms.append("no_map")
    if state_unsaved:
        alarms.append("state_unsaved")
    rec = dict(recording or {"state": "off"})
    if rec.get("state") == "failed":
        alarms.append("recording_failed")
    if transmitter is not None and (transmitter.get("state") == "failed"
                                    or transmitter.get("device", "running") != "running"):
        alarms.append("transmitter_down")

    bits_per_symbol = int(m.total_bits) if m is not None else 0
    rate_bps = (bits_per_symbol * float(symbol_rate_hz)
                if symbol_rate_hz is not None and m is not None else None)
    data_rate_bps = (bits_per_symbol * int(data_symbols) * float(frame_rate_hz)
                     if None not in (frame_rate_hz, data_symbols) and m is not None else None)
    return {
        "type": "status",
        "version": STATUS_VERSION,
        "time_s": finite(time_s),
        "epoch": str(epoch),
        "driver": {"name": str(driver.get("name", "")), "state": str(driver.get("state", "")),
                   "error": driver.get("error"),
                   "counters": {str(k): int(v) for k, v in
                                dict(driver.get("counters", {})).items()},
                   "clock_offset_ppm": finite(driver.get("clock_offset_ppm"), 1)},
        "frames": {"received": int(frames.get("received", 0)),
                   "accepted": int(frames.get("accepted", 0)),
                   "rejected": {str(k): int(v) for k, v in
                                dict(frames.get("rejected", {})).items() if v},
                   "decode_errors": int(frames.get("decode_errors", 0)),
                   "last_frame": int(frames.get("last_frame", -1)),
                   "tracking": {str(k): int(v) for k, v in
                                dict(frames.get("tracking", {})).items() if v}},
        "estimate_age_s": finite(estimate_age_s),
        "band": band,
        "rate": {"bits_per_symbol": bits_per_symbol,
                 "data_rate_bps": finite(data_rate_bps, 1),
                 "line_rate_bps": finite(rate_bps, 1), "rate_bps": finite(rate_bps, 1),
                 "frame_rate_hz": finite(frame_rate_hz),
                 "data_symbols": None if data_symbols is None else int(data_symbols),
                 "symbols_per_frame": None if symbols_per_frame is None
                 else int(symbols_per_frame)},
        "margin": {"headroom_db": finite(m.margin_db, 2) if m is not None else None,
                   "target_db": finite(target_margin_db, 2)},
        "margin_db": finite(m.margin_db, 2) if m is not None else None,
        "map": None if m is None else {
            "seq": int(m.seq), "reason": str(m.reason), "kind": current_kind,
            "fallback": bool(m.fallback), "effective_frame": int(m.effective_frame),
            "created_s": finite(m.created_s)},
        "maps_published": {str(k): int(v) for k, v in dict(maps_published or {}).items()},
        "changes": [{"time_s": finite(c.time_s), "kind": c.kind, "reason": c.reason,
                     "seq": int(c.seq)} for c in changes],
        "acks": {str(k): {"seq": int(v.get("seq", -1)), "age_s": finite(v.get("age_s"))}
                 for k, v in dict(acks or {}).items()},
        "recording": {"state": str(rec.get("state", "off")),
                      "path": None if rec.get("path") is None else str(rec["path"]),
                      "error": None if rec.get("error") is None else str(rec["error"])},
        "protocol_errors": {str(sock): {str(r): int(n) for r, n in dict(reasons).items()}
                            for sock, reasons in dict(protocol_errors or {}).items()},
        "link": None if link is None else {
            "frames": int(link.get("frames", 0)),
            "frame_errors": int(link.get("frame_errors", 0)),
            "frame_error_rate": finite(link.get("frame_error_rate"), 6),
            "bits": int(link.get("bits", 0)), "bit_errors": int(link.get("bit_errors", 0)),
            "bit_error_rate": finite(link.get("bit_error_rate"), 9),
            "goodput_bps": finite(link.get("goodput_bps"), 1),
            "link_time_s": finite(link.get("link_time_s"))},
        "outer": None if outer is None else {
            "active": bool(outer.get("active", False)),
            "offset_db": finite(outer.get("offset_db"), 2),
            "fer": finite(outer.get("fer"), 4),
            "window": int(outer.get("window", 0)),
            "target_fer": finite(outer.get("target_fer")),
            **{k: int(outer.get(k, 0)) for k in ("outcomes", "errored", "repeated",
                                                   "went_off")},
            "dropped": {str(k): int(v) for k, v in dict(outer.get("dropped", {})).items()}},
        "transmitter": None if transmitter is None else dict(transmitter),
        "alarms": alarms,
    }


def controller_fields(controller: LinkController, time_s: float) -> dict[str, Any]:
    """The :func:`build_status` arguments a link controller holds, at ``time_s``.

    Returns
    -------
    dict
        ``frames`` (counters, rejections, the estimator's tracking counters), ``estimate_age_s``,
        ``tone_index`` and ``snr_db`` of the tracked view, ``current_map``, ``current_kind``,
        ``maps_published``, ``changes``, ``stale``, ``state_unsaved`` and ``outer``.
    """
    c = controller
    tracked = c.last_tracked
    tracking = {k: v for k, v in c.estimator.counters.items()
                if k not in c.rejected and k != "accepted"}
    return dict(frames={**c.frames, "rejected": dict(c.rejected), "tracking": tracking},
                estimate_age_s=c.estimate_age_s(time_s),
                tone_index=None if tracked is None else tracked.tone_index,
                snr_db=None if tracked is None else tracked.snr_db,
                current_map=c.current_map, current_kind=c.current_kind,
                maps_published=c.maps_published, changes=list(c.changes), stale=c.stale,
                state_unsaved=c.state_unsaved, outer=c.outer_status(time_s))


def driver_fields(driver, state: str, error: str | None) -> dict[str, Any]:
    """The :func:`build_status` arguments a source gives: ``driver`` (name, state, error,
    counters), ``link`` (the simulator's closed-loop counts, else None) and ``frame_rate_hz``
    (frame slots per second where the source knows it, as the simulator does, else None).

    A running source may report a state of its own (a supervised radio: "running",
    "reconnecting", "failed"); otherwise ``state`` (the service's view) is shown.
    ``driver.clock_offset_ppm`` is the radio's measured sample clock offset, ppm, rounded to
    0.1 (None from other sources and until it is measured).
    """
    own = getattr(driver, "state", None)
    shown = own if state == "running" and isinstance(own, str) else state
    link = getattr(driver, "link", None)
    return dict(driver={"name": getattr(driver, "name", "driver"), "state": shown,
                        "error": error, "counters": dict(getattr(driver, "counters", {})),
                        "clock_offset_ppm": finite(getattr(driver, "clock_offset_ppm", None),
                                                   1)},
                link=None if link is None else link.summary(),
                frame_rate_hz=getattr(driver, "frame_rate_hz", None))


def summary_line(status: Mapping[str, Any]) -> str:
    """One readable line of a status message (for logs, ``brimline run`` and plain terminals)."""
    fr = status.get("frames", {})
    rej = sum(dict(fr.get("rejected", {})).values()) + int(fr.get("decode_errors", 0))
    m = status.get("map") or {}
    rate = status.get("rate", {})
    margin = status.get("margin_db")
    margin_txt = f"{margin:+.1f}dB" if margin is not None else "-"
    target = (status.get("margin") or {}).get("target_db")
    alarms = status.get("alarms", [])
    return (f"t={_num(status.get('time_s'), '.1f')}s frames={fr.get('received', 0)} "
            f"rejected={rej} bits/sym={rate.get('bits_per_symbol', 0)} {rate_text(rate)} "
            f"headroom={margin_txt} target_margin={_num(target, '.1f')}dB "
            f"seq={m.get('seq', '-')} {link_text(status.get('link'))}"
            f"alarms={','.join(alarms) if alarms else 'none'}")


def rate_text(rate: Mapping[str, Any]) -> str:
    """``data_rate=... line_rate=...`` of a status message's ``rate`` block, in Mbit/s."""
    data, line = rate.get("data_rate_bps"), rate.get("line_rate_bps", rate.get("rate_bps"))
    return (f"data_rate={'-' if data is None else f'{data / 1e6:.3f}Mbit/s'} "
            f"line_rate={'-' if line is None else f'{line / 1e6:.2f}Mbit/s'}")


def link_text(link: Mapping[str, Any] | None) -> str:
    """``goodput=... fer=... ber=... `` of a status message's ``link`` block ("" without one)."""
    if not link:
        return ""
    gp = link.get("goodput_bps")
    gp_txt = "-" if gp is None else f"{gp / 1e6:.3f}Mbit/s"
    return (f"goodput={gp_txt} fer={_num(link.get('frame_error_rate'), '.2g')} "
            f"ber={_num(link.get('bit_error_rate'), '.2g')} ")


def _num(v, fmt: str) -> str:
    return "-" if v is None else format(v, fmt)
