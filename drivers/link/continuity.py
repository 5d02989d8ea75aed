"""Whether a received frame stream is contiguous, judged from the frame counters in the headers.

A radio (or an SDR framework's sample stream) hands samples over in buffers, and nothing
guarantees that one buffer follows the previous one without a gap: a receive overflow drops
samples between them silently. The transmitter writes a 16-bit frame counter into every header
(:func:`brimline.drivers.link.frame.encode_header`), so the receiver can tell:

* ``lost_frames``: frames whose counters never arrived (counter step minus one, less the frames
  found in between whose header failed its CRC, which were received but could not be read);
* ``suspected_overflows``: such a gap with a buffer boundary between the two frames (samples
  lost between buffers rather than frames lost to noise inside one buffer);
* ``counter_repeats``: the same counter again (a cyclic transmit buffer repeats one frame; no
  gap can be seen then);
* ``counter_jumps``: a step of more than half the counter range, i.e. backwards (the
  transmitter restarted), not counted as lost frames;
* ``damaged_frames``: frames that span a buffer boundary where samples were lost. Such a frame
  is spliced from two stretches of the signal; its estimate is marked invalid. A frame that
  spans a boundary is held until the next readable header says whether the boundary was
  contiguous, so its estimate comes out one frame later (at most :data:`MAX_HELD` frames are
  held; beyond that the held ones are let out, the spanning ones marked invalid).

The tracker is pure bookkeeping: sample positions and header fields in, verdicts out. The
caller numbers samples from the first one it fed (``FrameScanner`` positions) and calls
:meth:`Continuity.restart` whenever it starts a new stream (after a device was reopened).
"""

from __future__ import annotations

import collections
from dataclasses import dataclass
from typing import Any

__all__ = ["Continuity", "COUNTER_MODULUS", "MAX_HELD"]

#: The header's frame counter is 16 bits wide.
COUNTER_MODULUS = 1 << 16
#: Most frames held back waiting for a readable header.
MAX_HELD = 4


@dataclass
class _Held:
    item: Any
    spans: bool  # the frame spans a buffer boundary
    header_ok: bool


class Continuity:
    """Frame-counter bookkeeping of one received stream.

    Parameters
    ----------
    modulus : int
        Counter range (``COUNTER_MODULUS``).

    Attributes
    ----------
    counters : collections.Counter
        ``lost_frames``, ``suspected_overflows``, ``counter_repeats``, ``counter_jumps``,
        ``damaged_frames`` (see the module docstring).
    overflow_positions : list of int
        For each suspected overflow, the buffer boundary (stream position) where the samples
        were most likely lost: one inside the frame before the gap (a header read before the
        loss, the rest spliced), else the last one before the frame after the gap starts, else
        the first one inside that frame. The caller takes them out (an IQ capture starts a new
        segment there).

    Examples
    --------
    >>> c = Continuity()
    >>> c.boundary(0)
    >>> [ok for _, ok in c.frame("a", start=0, end=100, header_ok=True, counter=7)]
    [True]
    >>> c.boundary(150)
    >>> [ok for _, ok in c.frame("b", start=300, end=400, header_ok=True, counter=10)]
    [True]
    >>> c.counters["lost_frames"], c.counters["suspected_overflows"]
    (2, 1)
    """

    def __init__(self, modulus: int = COUNTER_MODULUS) -> None:
        self.modulus = int(modulus)
        self.counters: collections.Counter[str] = collections.Counter()
        self._boundaries: collections.deque[int] = collections.deque(maxlen=64)
        self._last_counter: int | None = None
        self._last_end = 0
        self._last_start = 0
        self._unread = 0  # frames with a failed header since the last readable one
        self._held: list[_Held] = []
        self.overflow_positions: list[int] = []

    def restart(self) -> list[tuple[Any, bool]]:
        """Forget the stream (a new one begins at sample 0); held frames come out invalid."""
        out = [(h.item, False) for h in self._held]
        self.counters["damaged_frames"] += len(out)
        self._held.clear()
        self._boundaries.clear()
        self._last_counter, self._last_end, self._unread = None, 0, 0
        self._last_start = 0
        return out

    def boundary(self, position: int) -> None:
        """A new buffer begins at sample ``position`` (samples before it came in earlier ones)."""
        self._boundaries.append(int(position))

    def _boundary_in(self, low: int, high: int) -> bool:
        return any(low < b < high for b in self._boundaries)

    def _gap_boundary(self, start: int, end: int) -> int | None:
        spliced = [b for b in self._boundaries if self._last_start < b < self._last_end]
        if spliced:
            return spliced[-1]
        before = [b for b in self._boundaries if self._last_end - 1 < b <= start]
        if before:
            return before[-1]
        inside = [b for b in self._boundaries if start < b < end]
        return inside[0] if inside else None

    def frame(self, item: Any, *, start: int, end: int, header_ok: bool,
              counter: int) -> list[tuple[Any, bool]]:
        """Judge one found frame.

        Parameters
        ----------
        item : object
            What the caller wants back (its estimate).
        start, end : int
            First and one-past-last sample of the frame in stream positions.
        header_ok : bool
            Whether the header passed its CRC (``counter`` is read only then).
        counter : int
            The header's frame counter.

        Returns
        -------
        list of (item, ok)
            Frames now judged, in arrival order (possibly empty while a frame is held);
            ``ok`` is False for a frame spliced across lost samples (or one that cannot be
            judged), whose estimate must be marked invalid.
        """
        spans = self._boundary_in(start, end)
        if not header_ok:
            self._unread += 1
            if not spans and not self._held:
                return [(item, True)]
            self._held.append(_Held(item, spans, False))
            if len(self._held) > MAX_HELD:
                return self._release(gap=True)
            return []
        gap = False
        if self._last_counter is not None:
            step = (int(counter) - self._last_counter) % self.modulus
            if step == 0:
                self.counters["counter_repeats"] += 1
            elif step > self.modulus // 2:
                self.counters["counter_jumps"] += 1
            else:
                missing = max(step - 1 - self._unread, 0)
                if missing:
                    gap = True
                    self.counters["lost_frames"] += missing
                    if self._boundary_in(self._last_end - 1, end):
                        self.counters["suspected_overflows"] += 1
                        where = self._gap_boundary(start, end)
                        if where is not None:
                            self.overflow_positions.append(where)
        self._last_counter, self._last_end, self._unread = int(counter) % self.modulus, end, 0
        self._last_start = start
        out = self._release(gap)
        if spans and not gap:
            self._held.append(_Held(item, True, True))  # judged by the next readable header
        else:
            ok = not (spans and gap)
            if not ok:
                self.counters["damaged_frames"] += 1
            out.append((item, ok))
        return out

    def _release(self, gap: bool) -> list[tuple[Any, bool]]:
        """Let the held frames out: a spanning one is good only when no gap followed it."""
        out = []
        for h in self._held:
            ok = not (h.spans and (gap or not h.header_ok))
            if not ok:
                self.counters["damaged_frames"] += 1
            out.append((h.item, ok))
        self._held.clear()
        return out
