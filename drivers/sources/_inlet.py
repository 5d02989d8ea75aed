"""The receiving socket of the socket sources (pushed estimates, IQ streams) and their
rate-limited rejection log.

:class:`Inlet` opens one ZeroMQ socket, PULL (senders PUSH) or SUB (senders PUB; subscribed to
one topic or everything), bound or connected, with ``LINGER`` 0, a receive queue bound
(``RCVHWM``) and ``MAXMSGSIZE`` (ZeroMQ drops the connection of a peer that sends a larger
part, before any memory is spent on it; the peer reconnects). The socket is made and bound in
the driver's constructor, so a bad or busy endpoint is one error at start; from then on it is
used by the one thread that runs ``frames()`` (the thread start is the full memory barrier
ZeroMQ asks for when a socket moves between threads) and closed by that thread as it leaves,
or by ``close()`` when no thread ever ran it.

:class:`RejectLog` counts rejections by reason and logs at most one warning per
``warn_every_s`` (with the count since the last), so a flood of bad messages costs a counter
increment each, not a log line each.
"""

from __future__ import annotations

import collections
import logging
import threading
import time
from typing import Callable

import zmq

from brimline.daemon.errors import SourceError

__all__ = ["Inlet", "RejectLog", "ENDPOINT_SCHEMES", "check_endpoint"]

#: Transports an endpoint may use.
ENDPOINT_SCHEMES = ("tcp://", "ipc://", "inproc://")


def check_endpoint(key: str, value: str, error: type[Exception] = ValueError) -> str:
    """``value`` if it looks like a ZeroMQ endpoint (``tcp://host:port``, ``ipc://path``,
    ``inproc://name``), else ``error("key=value ...")``."""
    if not isinstance(value, str) or not value.startswith(ENDPOINT_SCHEMES) or \
            len(value) <= len(value.split("://")[0]) + 3:
        raise error(f"{key}={value!r} must be a ZeroMQ endpoint such as "
                    f"tcp://127.0.0.1:7345, ipc:///tmp/name or inproc://name")
    if value.startswith("tcp://") and ":" not in value[len("tcp://"):]:
        raise error(f"{key}={value!r} needs a port (tcp://host:port)")
    return value


class RejectLog:
    """Counted rejections with a rate-limited warning.

    Parameters
    ----------
    counters : collections.Counter
        Where rejections are counted (the driver's ``counters``).
    logger : logging.Logger
        Where the warnings go.
    what : str
        Names the source in the warning (``"driver.pushed"``).
    warn_every_s : float
        Least time between two warnings, s.
    clock : callable
        Monotonic clock, s.
    """

    def __init__(self, counters: collections.Counter, logger: logging.Logger, what: str,
                 warn_every_s: float, clock: Callable[[], float] = time.monotonic) -> None:
        self.counters, self.log, self.what = counters, logger, what
        self.warn_every_s = float(warn_every_s)
        self.clock = clock
        self._last_warn = -float("inf")
        self._since = 0

    def reject(self, reason: str, detail: str) -> None:
        """Count one rejection under ``reason``; warn if the last warning is old enough."""
        self.counters[reason] += 1
        self._since += 1
        now = self.clock()
        if now - self._last_warn >= self.warn_every_s:
            self.log.warning("%s: message rejected (%s): %s; %d rejected since the last "
                             "warning", self.what, reason, detail[:200], self._since)
            self._last_warn, self._since = now, 0


class Inlet:
    """One receiving socket (see the module docstring).

    Parameters
    ----------
    key : str
        Config path of the endpoint, for messages (``driver.pushed.endpoint``).
    endpoint : str
        Where to bind or connect.
    bind : bool
        Bind (senders connect) or connect (senders bind).
    pattern : {"pull", "sub"}
        Socket type.
    topic : bytes
        SUB subscription prefix (``b""``: everything).
    max_message_bytes : int
        ``MAXMSGSIZE`` of the socket.
    queue_messages : int
        ``RCVHWM`` of the socket.
    context : zmq.Context, optional
        Context to use; by default one is made and terminated with the inlet.

    Raises
    ------
    SourceError
        The endpoint cannot be bound or connected (names ``key`` and the endpoint).
    """

    def __init__(self, key: str, endpoint: str, *, bind: bool, pattern: str, topic: bytes,
                 max_message_bytes: int, queue_messages: int,
                 context: zmq.Context | None = None) -> None:
        self.endpoint = endpoint
        self._own_context = context is None
        self._context = context if context is not None else zmq.Context()
        self._lock = threading.Lock()
        self._owner: int | None = None  # ident of the thread that runs the receive loop
        self._closed = False
        kind = zmq.PULL if pattern == "pull" else zmq.SUB
        self.socket = self._context.socket(kind)
        try:
            self.socket.setsockopt(zmq.LINGER, 0)
            self.socket.setsockopt(zmq.RCVHWM, int(queue_messages))
            self.socket.setsockopt(zmq.MAXMSGSIZE, int(max_message_bytes))
            if kind == zmq.SUB:
                self.socket.setsockopt(zmq.SUBSCRIBE, topic)
            if bind:
                self.socket.bind(endpoint)
                self.endpoint = self.socket.getsockopt(zmq.LAST_ENDPOINT).decode()
            else:
                self.socket.connect(endpoint)
        except zmq.ZMQError as exc:
            self._shut()
            raise SourceError(f"{key}={endpoint}: cannot {'bind' if bind else 'connect'}: "
                              f"{exc}") from exc

    def take(self) -> bool:
        """Claim the socket for the calling thread (False once the inlet is closed)."""
        with self._lock:
            if self._closed:
                return False
            self._owner = threading.get_ident()
            return True

    def receive(self, timeout_ms: int) -> list[bytes] | None:
        """The next message (list of parts), or None when none came within ``timeout_ms``."""
        if not self.socket.poll(timeout_ms, zmq.POLLIN):
            return None
        try:
            return self.socket.recv_multipart(zmq.NOBLOCK)
        except zmq.Again:
            return None

    def release(self) -> None:
        """Close the socket from the thread that took it (or any thread if none did)."""
        with self._lock:
            if self._closed:
                return
            self._closed = True
        self._shut()

    def close(self) -> None:
        """Close unless a receiving thread owns the socket (it closes it as it leaves)."""
        with self._lock:
            if self._owner is not None or self._closed:
                return
            self._closed = True
        self._shut()

    def _shut(self) -> None:
        self.socket.close(linger=0)
        if self._own_context:
            self._context.term()
