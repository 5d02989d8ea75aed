"""Raw IQ over ZeroMQ as the transmit sink: :class:`IqStreamSink`.

Each frame slot goes out as one single-frame message of little-endian complex64 samples in
full-scale units, the layout SDR frameworks' ZeroMQ sources read. ``pattern`` is ``pub`` (every
subscriber gets every slot; a slow one loses slots) or ``push`` (one consumer; slots wait in the
queue up to the high-water mark). Sends never block: a slot ZeroMQ refuses is counted
``dropped``. Silence is the absence of messages.
"""

from __future__ import annotations

import numpy as np
import zmq

from brimline.daemon.errors import SinkError
from brimline.drivers.sinks.base import Sink

__all__ = ["IqStreamSink", "STREAM_PATTERNS"]

STREAM_PATTERNS = ("pub", "push")


class IqStreamSink(Sink):
    """Frame slots of raw complex64 IQ on a ZeroMQ socket.

    Parameters
    ----------
    endpoint : str
        Endpoint to bind (``bind``) or connect to.
    pattern : {"pub", "push"}
        Socket type.
    bind : bool
        Bind (True) or connect (False).
    hwm : int
        Send high-water mark in messages.
    context : zmq.Context or None
        Context for the socket; None makes (and at close terminates) a private one.

    Raises
    ------
    SinkError
        When the socket cannot bind or connect (names the endpoint).
    """

    name = "stream"

    def __init__(self, endpoint: str, *, pattern: str = "pub", bind: bool = True,
                 hwm: int = 64, context: zmq.Context | None = None) -> None:
        super().__init__()
        if pattern not in STREAM_PATTERNS:
            raise SinkError(f"tx.stream_pattern={pattern!r} must be one of "
                            f"{list(STREAM_PATTERNS)}")
        self._own = context is None
        self.context = zmq.Context() if context is None else context
        self._socket = self.context.socket(zmq.PUB if pattern == "pub" else zmq.PUSH)
        self._socket.setsockopt(zmq.LINGER, 0)
        self._socket.setsockopt(zmq.SNDHWM, int(hwm))
        try:
            if bind:
                self._socket.bind(endpoint)
            else:
                self._socket.connect(endpoint)
        except zmq.ZMQError as exc:
            self._socket.close(0)
            if self._own:
                self.context.term()
            raise SinkError(f"tx.stream_endpoint={endpoint}: {exc}") from exc
        self.endpoint = self._socket.getsockopt(zmq.LAST_ENDPOINT).decode() if bind else endpoint

    def _send(self, samples: np.ndarray) -> None:
        try:
            self._socket.send(np.ascontiguousarray(samples, dtype="<c8"), flags=zmq.NOBLOCK,
                              copy=False)
        except zmq.Again:
            self.counters["dropped"] += 1

    def _release(self) -> None:
        self._socket.close(0)
        if self._own:
            self.context.term()
