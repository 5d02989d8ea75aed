"""Page data of the browser view (``brimline lookout``): status messages in, JSON-ready dicts out.

Everything here is pure: no sockets, no clock, no event loop. :func:`page_frame` reads one status
message (the layout of :mod:`brimline.daemon.runtime.status`) into the flat dict the page draws;
:class:`Timeline` keeps the bounded history a newly opened page starts from (rate and margin
points, waterfall rows of per-tone SNR, map-change and alarm marks) and turns each frame into
the one update message every connected page receives.

Tolerance, both ways:

- a field the status does not carry (goodput without a closed loop, a field a later daemon adds
  and an older one lacks) becomes ``None`` and the page draws a marked empty place for it;
  fields the page does not know are ignored;
- a known field of the wrong type (a string where a number belongs, a band list that is not a
  list) raises :class:`~brimline.daemon.errors.ProtocolError` with reason ``status_shape``,
  naming the field: the server drops that message and counts it, and the page goes on with the
  last good one.

Several figures are looked up at more than one place (:data:`FIGURES`): the first place present
wins, so the page shows the net data rate and the target margin as soon as a daemon publishes
them, under either name, and the current daemon's ``rate.rate_bps`` and ``margin_db`` until then.

The band in the status is grouped into at most ``band.columns`` adjacent groups of data tones.
The tone axis of the page is in the daemon's tone numbering. Where the status lists each group's
first tone (``band.tone_index``, with ``band.tones_per_column``), a group stands at its first
tone plus half a group; otherwise :func:`column_tones` spreads the groups evenly between
``tone_first`` and ``tone_last`` (a group then stands for its tones, and the pilots and the
empty DC tone among them).

Alarms stay on the page after they clear: :class:`Timeline` keeps a book of every alarm seen
with how often it was raised and the link time it was last raised and cleared, so an emergency
that lasted one status message still shows its count.
"""

from __future__ import annotations

import collections
import math
from typing import Any, Iterable, Mapping, NamedTuple, Sequence

from brimline.daemon.errors import ProtocolError
from brimline.daemon.runtime.status import ALARMS

__all__ = ["Figure", "FIGURES", "MAX_BAND_COLUMNS", "page_frame", "column_tones", "Timeline"]

#: Largest band list the page accepts (the daemon sends at most 128 groups).
MAX_BAND_COLUMNS = 4096
_MAX_TEXT = 300  # characters of a reason, error or name the page keeps
_SHAPE = "status_shape"


class Figure(NamedTuple):
    """One number of the page: where the status holds it, its label, unit and scale."""

    key: str
    label: str
    unit: str
    scale: float
    paths: tuple[tuple[str, ...], ...]


#: The figures the page shows, in order; each value is read from the first path present and
#: multiplied by ``scale`` (bit/s to Mbit/s).
FIGURES: tuple[Figure, ...] = (
    Figure("line_rate_mbps", "line rate (every symbol)", "Mbit/s", 1e-6,
           (("rate", "line_rate_bps"), ("rate", "rate_bps"))),
    Figure("net_rate_mbps", "net data rate (data symbols)", "Mbit/s", 1e-6,
           (("rate", "net_rate_bps"), ("rate", "data_rate_bps"), ("rate", "net_bps"))),
    Figure("goodput_mbps", "goodput (delivered frames)", "Mbit/s", 1e-6,
           (("link", "goodput_bps"),)),
    Figure("headroom_db", "headroom above target margin", "dB", 1.0,
           (("margin", "headroom_db"), ("margin", "achieved_db"), ("margin_db",))),
    Figure("target_margin_db", "target margin", "dB", 1.0,
           (("margin", "target_db"), ("target_margin_db",))),
    Figure("bits_per_symbol", "bits per OFDM symbol", "bit", 1.0,
           (("rate", "bits_per_symbol"),)),
    Figure("frame_error_rate", "frame error rate", "", 1.0, (("link", "frame_error_rate"),)),
    Figure("estimate_age_s", "estimate age", "s", 1.0, (("estimate_age_s",),)),
)
_SERIES = ("line_rate_mbps", "net_rate_mbps", "goodput_mbps", "headroom_db", "target_margin_db")


def _bad(where: str, value: Any, what: str) -> ProtocolError:
    text = repr(value)
    text = text if len(text) <= 40 else text[:37] + "..."
    return ProtocolError(f"status {where}={text} {what}", reason=_SHAPE)


def _number(value: Any, where: str) -> float | None:
    if value is None:
        return None
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise _bad(where, value, "is not a number")
    value = float(value)
    return value if math.isfinite(value) else None


def _integer(value: Any, where: str) -> int | None:
    number = _number(value, where)
    if number is None:
        return None
    if number != int(number):
        raise _bad(where, value, "is not a whole number")
    return int(number)


def _text(value: Any) -> str | None:
    if value is None:
        return None
    return str(value)[:_MAX_TEXT]


def _mapping(value: Any, where: str) -> Mapping[str, Any]:
    if value is None:
        return {}
    if not isinstance(value, Mapping):
        raise _bad(where, value, "is not a mapping")
    return value


def _sequence(value: Any, where: str, limit: int) -> Sequence[Any]:
    if value is None:
        return []
    if isinstance(value, (str, bytes)) or not isinstance(value, Sequence):
        raise _bad(where, value, "is not a list")
    if len(value) > limit:
        raise _bad(where, f"<{len(value)} items>", f"has more than {limit} items")
    return value


def _numbers(value: Any, where: str) -> list[float | None]:
    return [_number(v, f"{where}[{i}]")
            for i, v in enumerate(_sequence(value, where, MAX_BAND_COLUMNS))]


def _lookup(status: Mapping[str, Any], path: tuple[str, ...]) -> tuple[bool, Any]:
    node: Any = status
    for name in path:
        if not isinstance(node, Mapping) or name not in node:
            return False, None
        node = node[name]
    return True, node


def column_tones(tone_first: float | None, tone_last: float | None,
                 columns: int) -> list[float]:
    """Tone number at the centre of each band group, in the daemon's tone numbering.

    Parameters
    ----------
    tone_first, tone_last : float or None
        First and last data tone of the band.
    columns : int
        Number of adjacent groups the band was split into.

    Returns
    -------
    list of float
        ``columns`` values from ``tone_first`` to ``tone_last`` (group centres when a group
        holds several tones; each tone itself when ``columns`` equals the tone span); empty
        when the band is unknown.

    Examples
    --------
    >>> column_tones(-2, 2, 5)
    [-2.0, -1.0, 0.0, 1.0, 2.0]
    """
    if tone_first is None or tone_last is None or columns <= 0:
        return []
    if columns == 1:
        return [(tone_first + tone_last) / 2.0]
    span = float(tone_last) - float(tone_first)
    return [round(float(tone_first) + span * i / (columns - 1), 3) for i in range(columns)]


def _alarms(value: Any) -> list[dict[str, Any]]:
    """Alarms as ``name``, ``meaning``, ``count``, ``since_s``: plain names or dicts with counts."""
    if isinstance(value, Mapping):  # {name: {count, since_s}} or {name: count}
        items: Iterable[Any] = [{"name": k, **(v if isinstance(v, Mapping) else {"count": v})}
                                for k, v in value.items()]
    else:
        items = _sequence(value, "alarms", 256)
    out = []
    for i, item in enumerate(items):
        if isinstance(item, str):
            name, count, since = item, None, None
        elif isinstance(item, Mapping):
            name = _text(item.get("name") or item.get("alarm")) or "?"
            count = _integer(item.get("count"), f"alarms[{i}].count")
            since = _number(item.get("since_s", item.get("age_s")), f"alarms[{i}].since_s")
        else:
            raise _bad(f"alarms[{i}]", item, "is neither a name nor a mapping")
        out.append({"name": name[:64], "meaning": ALARMS.get(name, ""), "count": count,
                    "since_s": since})
    return out


def _changes(value: Any) -> list[dict[str, Any]]:
    out = []
    for i, c in enumerate(_sequence(value, "changes", 1024)):
        c = _mapping(c, f"changes[{i}]")
        out.append({"time_s": _number(c.get("time_s"), f"changes[{i}].time_s"),
                    "seq": _integer(c.get("seq"), f"changes[{i}].seq"),
                    "kind": _text(c.get("kind")), "reason": _text(c.get("reason"))})
    return out


def page_frame(status: Mapping[str, Any]) -> dict[str, Any]:
    """The page's view of one status message.

    Parameters
    ----------
    status : mapping
        A decoded status message (``type: "status"``).

    Returns
    -------
    dict
        JSON-safe: ``status_seq``, ``time_s``, ``epoch``, ``source`` (name, state, error,
        ``clock_offset_ppm``: the radio's sample clock offset, None where not measured),
        ``band`` (tone_first, tone_last, tones, columns, ``tone_axis``, snr_db, bits,
        power_db), ``figures`` (list of key, label, unit and value, None where the status does
        not carry it), ``map``, ``changes`` (all of the message's changes, newest first),
        ``alarms`` (name, meaning, count, since_s) and ``frames`` (received, accepted,
        rejected in all).

    Raises
    ------
    ProtocolError
        ``reason="status_shape"`` when a known field has the wrong type; the message names
        the field.
    """
    status = _mapping(status, "message")
    band = _mapping(status.get("band"), "band")
    snr = _numbers(band.get("snr_db"), "band.snr_db")
    bits = _numbers(band.get("bits"), "band.bits")
    power = _numbers(band.get("power_db"), "band.power_db")
    columns = max(len(snr), len(bits), len(power))
    tone_first = _number(band.get("tone_first"), "band.tone_first")
    tone_last = _number(band.get("tone_last"), "band.tone_last")
    firsts = _numbers(band.get("tone_index"), "band.tone_index")
    per = _number(band.get("tones_per_column"), "band.tones_per_column") or 1.0
    axis = ([round(t + (per - 1.0) / 2.0, 3) for t in firsts]
            if columns and len(firsts) == columns and None not in firsts
            else column_tones(tone_first, tone_last, columns))

    figures = []
    for fig in FIGURES:
        value = None
        for path in fig.paths:
            found, raw = _lookup(status, path)
            if found:
                number = _number(raw, ".".join(path))
                value = None if number is None else round(number * fig.scale, 6)
                break
        figures.append({"key": fig.key, "label": fig.label, "unit": fig.unit, "value": value})

    driver = _mapping(status.get("driver"), "driver")
    frames = _mapping(status.get("frames"), "frames")
    rejected = _mapping(frames.get("rejected"), "frames.rejected")
    n_rejected = sum(_integer(v, f"frames.rejected.{k}") or 0 for k, v in rejected.items())
    m = status.get("map")
    in_force = None
    if m is not None:
        m = _mapping(m, "map")
        in_force = {"seq": _integer(m.get("seq"), "map.seq"), "kind": _text(m.get("kind")),
                    "reason": _text(m.get("reason")), "fallback": bool(m.get("fallback")),
                    "effective_frame": _integer(m.get("effective_frame"),
                                                "map.effective_frame")}
    changes = _changes(status.get("changes"))
    return {
        "status_seq": _integer(status.get("status_seq"), "status_seq"),
        "time_s": _number(status.get("time_s"), "time_s"),
        "epoch": _text(status.get("epoch")),
        "source": {"name": _text(driver.get("name")), "state": _text(driver.get("state")),
                   "error": _text(driver.get("error")),
                   "clock_offset_ppm": _number(driver.get("clock_offset_ppm"),
                                               "driver.clock_offset_ppm")},
        "band": {"tone_first": tone_first, "tone_last": tone_last,
                 "tones": _integer(band.get("tones"), "band.tones"), "columns": columns,
                 "tone_axis": axis, "snr_db": snr, "bits": bits, "power_db": power},
        "figures": figures,
        "map": in_force,
        "changes": changes[::-1],
        "alarms": _alarms(status.get("alarms")),
        "frames": {"received": _integer(frames.get("received"), "frames.received"),
                   "accepted": _integer(frames.get("accepted"), "frames.accepted"),
                   "rejected": n_rejected + (_integer(frames.get("decode_errors"),
                                                      "frames.decode_errors") or 0)},
    }


class Timeline:
    """The bounded history behind the page: points, waterfall rows and marks.

    Parameters
    ----------
    points : int
        Rate and margin points kept (one per status message).
    rows : int
        Waterfall rows of per-tone SNR kept (one per status message with an SNR band).
    marks : int
        Map-change and alarm marks kept.

    Notes
    -----
    A status from another epoch, or one whose ``time_s`` runs backwards (the daemon restarted),
    starts the history afresh: the update then says ``reset`` and the page clears its charts.
    Map changes are marked once each, by sequence number, at their own ``time_s``; an alarm is
    marked when it appears (not while it stays) and counted in the alarm book, where it stays
    after it clears.
    """

    def __init__(self, *, points: int = 1200, rows: int = 240, marks: int = 400) -> None:
        for name, value in (("points", points), ("rows", rows), ("marks", marks)):
            if not isinstance(value, int) or value < 1:
                raise ValueError(f"{name}={value!r} must be a positive integer")
        self._points: collections.deque = collections.deque(maxlen=points)
        self._rows: collections.deque = collections.deque(maxlen=rows)
        self._marks: collections.deque = collections.deque(maxlen=marks)
        self._marked_seqs: collections.OrderedDict = collections.OrderedDict()
        self._max_seqs = marks
        self._book: dict[str, dict[str, Any]] = {}
        self.latest: dict[str, Any] | None = None

    def _clear(self) -> None:
        self._points.clear()
        self._rows.clear()
        self._marks.clear()
        self._marked_seqs.clear()
        self._book.clear()

    def _note_alarms(self, alarms: Sequence[Mapping[str, Any]], t: float | None) -> None:
        now = {a["name"]: a for a in alarms}
        for name, a in now.items():
            entry = self._book.get(name)
            if entry is None:
                if len(self._book) >= 64:  # bounded: names come from the wire
                    continue
                entry = self._book[name] = {"name": name, "meaning": a["meaning"], "count": 0,
                                            "raised_s": None, "cleared_s": None,
                                            "active": False}
            if not entry["active"]:
                entry.update(count=entry["count"] + 1, raised_s=t, active=True)
            if a.get("count") is not None:  # a daemon that counts its alarms knows best
                entry["count"] = a["count"]
        for name, entry in self._book.items():
            if entry["active"] and name not in now:
                entry.update(active=False, cleared_s=t)

    def alarm_book(self) -> list[dict[str, Any]]:
        """Every alarm seen since the history began: ``name``, ``meaning``, ``count`` (times
        raised), ``raised_s`` and ``cleared_s`` (link time, s), ``active``; active ones first,
        then the most recently raised."""
        return sorted((dict(e) for e in self._book.values()),
                      key=lambda e: (not e["active"], -(e["raised_s"] or 0.0), e["name"]))

    def add(self, frame: Mapping[str, Any]) -> dict[str, Any]:
        """Take one :func:`page_frame` and return the update message for the pages.

        Returns
        -------
        dict
            ``{"kind": "update", "reset": bool, "frame": frame, "point": dict or None,
            "row": dict or None, "marks": [new marks], "alarm_book": [...]}`` (see
            :meth:`alarm_book`).
        """
        prev = self.latest
        t = frame.get("time_s")
        reset = prev is not None and (
            frame.get("epoch") != prev.get("epoch")
            or (t is not None and prev.get("time_s") is not None and t < prev["time_s"]))
        if reset:
            self._clear()
        self.latest = dict(frame)
        point = row = None
        marks: list[dict[str, Any]] = []
        if t is not None:
            values = {f["key"]: f["value"] for f in frame.get("figures", [])}
            point = {"t": t, **{k: values.get(k) for k in _SERIES}}
            self._points.append(point)
            band = frame.get("band", {})
            if band.get("snr_db"):
                row = {"t": t, "tone_axis": band.get("tone_axis", []),
                       "snr_db": band["snr_db"]}
                self._rows.append(row)
            for c in reversed(frame.get("changes", [])):  # oldest first
                seq = c.get("seq")
                if seq is None or seq in self._marked_seqs:
                    continue
                self._marked_seqs[seq] = True
                if len(self._marked_seqs) > self._max_seqs:
                    self._marked_seqs.popitem(last=False)
                ct = c.get("time_s")
                marks.append({"t": t if ct is None else ct, "type": "map",
                              "kind": c.get("kind"), "label": f"seq {seq} {c.get('kind')}"})
            before = set() if (prev is None or reset) else {a["name"] for a in
                                                              prev.get("alarms", [])}
            for a in frame.get("alarms", []):
                if a["name"] not in before:
                    marks.append({"t": t, "type": "alarm", "kind": a["name"],
                                  "label": a["name"]})
            self._marks.extend(marks)
        self._note_alarms(frame.get("alarms", []), t)
        return {"kind": "update", "reset": bool(reset), "frame": self.latest, "point": point,
                "row": row, "marks": marks, "alarm_book": self.alarm_book()}

    def snapshot(self) -> dict[str, Any]:
        """Everything a newly opened page starts from.

        Returns
        -------
        dict
            ``{"kind": "snapshot", "frame": latest frame or None, "points": [...],
            "rows": [...], "marks": [...], "alarm_book": [...]}``, oldest first.
        """
        return {"kind": "snapshot", "frame": self.latest, "points": list(self._points),
                "rows": list(self._rows), "marks": list(self._marks),
                "alarm_book": self.alarm_book()}
