"""What every receiving socket loop does with a message it cannot use: drop, count, log rarely.

A receiving loop (the daemon's ack PULL and snapshot ROUTER, a follower's SUB and DEALER, the
watcher's SUB) never raises for what a peer sent. It hands the reason to a
:class:`DropCounter`, which counts it by socket and reason (for the status stream and the
follower's counters) and logs at most one warning per socket and reason every ``interval_s``
seconds, saying how many more arrived since the last warning. A flood of bad messages therefore
costs one counter increment each, not a log line each.

:func:`limit_inbound` puts a ceiling on the size of every frame a socket accepts
(``zmq.MAXMSGSIZE``): libzmq reads the size a frame announces and disconnects the peer before
buffering anything larger, so one oversized frame can no longer take the process's memory.
Note that the limit is per frame: a peer that sends an endless multipart message of small
frames is bounded only by CURVE (who may connect) and the receive high-water mark.
"""

from __future__ import annotations

import collections
import logging
import math
import time
from typing import Callable

import zmq

__all__ = ["DropCounter", "limit_inbound", "SMALL_MESSAGE_BYTES"]

#: Frame ceiling for sockets that only receive short requests, acknowledgements or
#: subscriptions: a legitimate one is under 300 bytes (an ack header is about 100), so 4 KiB
#: leaves ample room while keeping what a queue of them can hold small.
SMALL_MESSAGE_BYTES = 4 * 1024


def limit_inbound(socket: zmq.Socket, max_bytes: int) -> None:
    """Refuse (disconnect) a peer that sends a frame larger than ``max_bytes`` on ``socket``.

    Call before ``bind`` or ``connect``.

    Parameters
    ----------
    socket : zmq.Socket
        Any socket that receives (SUB, PULL, ROUTER, DEALER, and PUB for subscriptions).
    max_bytes : int
        Largest frame accepted, bytes (> 0).
    """
    if max_bytes <= 0:
        raise ValueError(f"max_bytes={max_bytes} must be > 0")
    socket.setsockopt(zmq.MAXMSGSIZE, int(max_bytes))


class DropCounter:
    """Counts dropped messages by socket and reason and logs them at a bounded rate.

    Parameters
    ----------
    logger : logging.Logger
        Where the warnings go.
    interval_s : float
        At most one warning per (socket, reason) in this many seconds (10 s by default, a
        common-practice log-throttling period).
    clock : callable
        Monotonic seconds (injected by tests).

    Examples
    --------
    >>> drops = DropCounter(logging.getLogger("demo"))
    >>> drops.drop("acks", "header_json", "header is not JSON")
    >>> drops.counts()
    {'acks': {'header_json': 1}}
    """

    def __init__(self, logger: logging.Logger, *, interval_s: float = 10.0,
                 clock: Callable[[], float] = time.monotonic) -> None:
        if not (math.isfinite(interval_s) and interval_s >= 0):
            raise ValueError(f"interval_s={interval_s} must be finite and >= 0")
        self._log = logger
        self.interval_s = float(interval_s)
        self._clock = clock
        self._counts: dict[str, collections.Counter[str]] = {}
        self._last_warned_s: dict[tuple[str, str], float] = {}
        self._since_warned: collections.Counter[tuple[str, str]] = collections.Counter()
        self.warnings_logged = 0

    def drop(self, socket: str, reason: str, detail: str = "") -> None:
        """Count one dropped message on ``socket`` for ``reason``; warn if none was due.

        Parameters
        ----------
        socket : str
            Which socket (``"acks"``, ``"snapshots"``, ``"maps"``, ``"status"``, ...).
        reason : str
            Short stable key (a :class:`~brimline.daemon.errors.ProtocolError` ``reason``,
            ``"forged"``, ``"request"``, ...).
        detail : str
            One line on what was wrong with this message (logged with the warning).
        """
        self._counts.setdefault(socket, collections.Counter())[reason] += 1
        key = (socket, reason)
        self._since_warned[key] += 1
        now = self._clock()
        last = self._last_warned_s.get(key)
        if last is not None and now - last < self.interval_s:
            return
        n = self._since_warned.pop(key)
        self._last_warned_s[key] = now
        self.warnings_logged += 1
        more = "" if n == 1 else f" ({n} such messages since the last warning)"
        self._log.warning("dropped a message on %s (%s)%s: %s", socket, reason, more, detail)

    def counts(self) -> dict[str, dict[str, int]]:
        """Dropped messages so far: ``{socket: {reason: n}}`` (a copy, JSON-ready)."""
        return {s: dict(c) for s, c in self._counts.items()}

    def total(self, socket: str | None = None) -> int:
        """Dropped messages on ``socket`` (all sockets when None)."""
        if socket is not None:
            return sum(self._counts.get(socket, {}).values())
        return sum(sum(c.values()) for c in self._counts.values())
