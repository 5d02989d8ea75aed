"""Prometheus exposition of the status message: the daemon's counters for existing monitoring.

:class:`MetricsEndpoint` serves ``/metrics`` over HTTP (the text exposition format) from the
latest status message the service published; it keeps no counters of its own. A scrape runs
:class:`StatusCollector`, which turns that one dict into metric families, so the numbers an
operator scrapes are exactly those of the ZeroMQ status stream (layout in
:mod:`brimline.daemon.runtime.status`) and nothing is counted twice.

The client library (``prometheus-client``) is an optional extra: it is imported when an endpoint
is opened, and its absence is a :class:`~brimline.daemon.errors.ConfigError` with the
``pip install 'brimline[metrics]'`` hint. The collector itself needs only the metric-family
classes and is built with them passed in.

Names follow the exposition conventions: the ``brimline_`` prefix, counters ending in
``_total``, base units as suffixes (``_seconds``, ``_bits``, ``_bits_per_second``), decibels as
``_decibels`` (a ratio the link is run by), one family per quantity with labels for its parts
(``reason``, ``kind``, ``counter``, ``follower``, ``state``, ``alarm``). A quantity that the
status leaves ``None`` (no estimate yet, no map yet) has no sample, rather than a made-up 0.

The server runs on the library's own thread (``start_http_server``); :meth:`MetricsEndpoint.update`
replaces one reference, which a scrape on that thread reads once, so no lock is needed. Bind to
``127.0.0.1`` (the default) unless the port is firewalled: the endpoint has no authentication.
"""

from __future__ import annotations

import math
import threading
from types import MappingProxyType
from typing import Any, Iterable, Iterator, Mapping

from brimline.daemon.errors import ConfigError
from brimline.daemon.limits import between, check_values

__all__ = ["METRICS_LIMITS", "MetricsEndpoint", "StatusCollector", "DRIVER_STATES"]

#: Limits of :class:`MetricsEndpoint`'s numeric keyword arguments, checked by the constructor and
#: by the ``metrics:`` config section alike (whose defaults are the constructor's).
METRICS_LIMITS = MappingProxyType({"port": between(0, 65535)})

#: Driver states the status reports (``driver.state``), each a sample of
#: ``brimline_driver_state`` (1 for the current one, 0 for the others).
DRIVER_STATES = ("starting", "running", "ended", "failed", "stopped")

_INSTALL_HINT = "install it with pip install 'brimline[metrics]'"


class StatusCollector:
    """A collector (the library's ``collect()`` protocol) over the latest status message.

    Parameters
    ----------
    families : module or namespace
        Where ``CounterMetricFamily`` and ``GaugeMetricFamily`` come from
        (``prometheus_client.core``).
    alarms : iterable of str
        Every alarm the status can raise; each gets a ``brimline_alarm`` sample (0 or 1).

    Notes
    -----
    Before the first status message a scrape shows only ``brimline_up 0``.
    """

    def __init__(self, families, alarms: Iterable[str] = ()) -> None:
        self._counter = families.CounterMetricFamily
        self._gauge = families.GaugeMetricFamily
        self._alarms = tuple(alarms)
        self._status: Mapping[str, Any] | None = None

    def update(self, status: Mapping[str, Any]) -> None:
        """Make ``status`` (a status message as published) the one the next scrape reads."""
        self._status = status

    def collect(self) -> Iterator:
        """Metric families of the latest status (called by the library on every scrape)."""
        st = self._status  # one read: update() may replace it meanwhile
        yield self._gauge("brimline_up", "1 once the daemon has published a status message",
                          value=0.0 if st is None else 1.0)
        if st is None:
            return
        yield from self._frames(st)
        yield from self._link(st)
        yield from self._driver(st)
        yield from self._acks(st)
        info = self._gauge("brimline_daemon_epoch", "the daemon's epoch (label), always 1",
                           labels=["epoch"])
        info.add_metric([str(st.get("epoch", ""))], 1.0)
        yield info
        alarms = set(st.get("alarms", []))
        fam = self._gauge("brimline_alarm", "1 while the alarm is raised (see the status "
                          "stream's alarms)", labels=["alarm"])
        for name in sorted(set(self._alarms) | alarms):
            fam.add_metric([name], 1.0 if name in alarms else 0.0)
        yield fam

    def _frames(self, st: Mapping[str, Any]) -> Iterator:
        fr = st.get("frames", {})
        yield self._counter("brimline_frames_received", "estimate frames received",
                            value=fr.get("received", 0))
        yield self._counter("brimline_frames_accepted", "estimate frames accepted",
                            value=fr.get("accepted", 0))
        yield self._counter("brimline_decode_errors", "messages that could not be decoded",
                            value=fr.get("decode_errors", 0))
        yield _labelled(self._counter("brimline_frames_rejected",
                                      "estimate frames rejected, by reason", labels=["reason"]),
                        fr.get("rejected", {}))
        yield _labelled(self._counter("brimline_estimator_events",
                                      "estimator tracking events (tone outliers held back, "
                                      "jumps, resets)", labels=["counter"]),
                        fr.get("tracking", {}))
        last = fr.get("last_frame")
        if last is not None and last >= 0:
            yield self._gauge("brimline_last_frame", "frame number of the newest estimate",
                              value=last)
        age = st.get("estimate_age_s")
        if age is not None:
            yield self._gauge("brimline_estimate_age_seconds",
                              "age of the newest accepted estimate", value=age)

    def _link(self, st: Mapping[str, Any]) -> Iterator:
        yield _labelled(self._counter("brimline_maps_published",
                                      "maps published, by decision kind", labels=["kind"]),
                        st.get("maps_published", {}))
        rate = st.get("rate", {})
        m = st.get("map")
        if m is None:
            return
        yield self._gauge("brimline_map_bits", "bits per OFDM symbol of the map in force",
                          value=rate.get("bits_per_symbol", 0))
        if rate.get("rate_bps") is not None:
            yield self._gauge("brimline_map_rate_bits_per_second",
                              "line rate of the map in force: bits per symbol x OFDM symbols "
                              "per second, as if every symbol carried data",
                              value=rate["rate_bps"])
        if rate.get("data_rate_bps") is not None:
            yield self._gauge("brimline_map_data_rate_bits_per_second",
                              "data rate of the map in force: data symbols only",
                              value=rate["data_rate_bps"])
        if st.get("margin_db") is not None:
            yield self._gauge("brimline_map_margin_decibels",
                              "headroom of the map in force beyond its target margin",
                              value=st["margin_db"])
        target = (st.get("margin") or {}).get("target_db")
        if target is not None:
            yield self._gauge("brimline_map_target_margin_decibels",
                              "target noise margin the loader adds to the gap", value=target)
        yield self._gauge("brimline_map_seq", "sequence number of the map in force",
                          value=m.get("seq", -1))
        yield self._gauge("brimline_map_fallback", "1 while the safe fallback map is in force",
                          value=1.0 if m.get("fallback") else 0.0)

    def _driver(self, st: Mapping[str, Any]) -> Iterator:
        drv = st.get("driver", {})
        current = str(drv.get("state", ""))
        fam = self._gauge("brimline_driver_state", "1 for the estimate source's current state",
                          labels=["state"])
        for state in sorted(set(DRIVER_STATES) | ({current} if current else set())):
            fam.add_metric([state], 1.0 if state == current else 0.0)
        yield fam
        yield _labelled(self._counter("brimline_driver_events",
                                      "the estimate source's own counters", labels=["counter"]),
                        drv.get("counters", {}))
        ppm = drv.get("clock_offset_ppm")
        if ppm is not None:
            yield self._gauge("brimline_sample_clock_offset_ppm",
                              "the radio's sample clock offset against the transmitter's, "
                              "parts per million (positive: fast)", value=ppm)

    def _acks(self, st: Mapping[str, Any]) -> Iterator:
        acks = st.get("acks", {})
        seq = self._gauge("brimline_follower_ack_seq",
                          "newest map sequence number a transmitter acknowledged",
                          labels=["follower"])
        age = self._gauge("brimline_follower_ack_age_seconds",
                          "time since that acknowledgement", labels=["follower"])
        for name, ack in sorted(acks.items()):
            seq.add_metric([str(name)], ack.get("seq", -1))
            if ack.get("age_s") is not None:
                age.add_metric([str(name)], ack["age_s"])
        yield seq
        yield age


def _labelled(family, values: Mapping[str, Any]):
    for key, value in sorted(values.items()):
        if value is not None and math.isfinite(float(value)):
            family.add_metric([str(key)], float(value))
    return family


class MetricsEndpoint:
    """HTTP endpoint serving the latest status message as Prometheus metrics.

    Parameters
    ----------
    host : str
        Address to bind (default loopback; the endpoint has no authentication).
    port : int
        TCP port; 0 picks a free one (see :attr:`port`).
    alarms : iterable of str
        Every alarm name the status can raise (``brimline_alarm`` shows each, 0 or 1).

    Raises
    ------
    ValueError
        ``port`` outside [0, 65535].
    ConfigError
        ``prometheus-client`` is not installed, or the address cannot be bound (names it).

    Examples
    --------
    >>> with MetricsEndpoint(port=0) as ep:  # doctest: +SKIP
    ...     ep.update(status)
    ...     print(ep.url)
    """

    def __init__(self, *, host: str = "127.0.0.1", port: int = 7349,
                 alarms: Iterable[str] = ()) -> None:
        check_values({"port": port}, METRICS_LIMITS, prefix="metrics.")
        try:  # optional extra: imported only when an endpoint is opened
            import prometheus_client
            from prometheus_client import core
        except ImportError:
            raise ConfigError(f"metrics.enabled needs prometheus-client: {_INSTALL_HINT}") \
                from None
        self.collector = StatusCollector(core, alarms)
        self._registry = prometheus_client.CollectorRegistry(auto_describe=False)
        self._registry.register(self.collector)
        try:
            self._server, self._thread = prometheus_client.start_http_server(
                int(port), addr=str(host), registry=self._registry)
        except (OSError, ValueError) as exc:
            raise ConfigError(f"metrics endpoint http://{host}:{port}: cannot bind ({exc})") \
                from exc
        self.host = str(host)
        self._lock = threading.Lock()
        self._closed = False

    @property
    def port(self) -> int:
        """The bound TCP port (the chosen one when 0 was asked for)."""
        return int(self._server.server_port)

    @property
    def url(self) -> str:
        """Where to scrape: ``http://HOST:PORT/metrics``."""
        host = f"[{self.host}]" if ":" in self.host else self.host
        return f"http://{host}:{self.port}/metrics"

    def update(self, status: Mapping[str, Any]) -> None:
        """Serve ``status`` (the dict the service just published) from the next scrape on."""
        if self._closed:
            raise RuntimeError("metrics endpoint is closed")
        self.collector.update(status)

    def close(self, timeout_s: float = 2.0) -> None:
        """Stop serving and release the port. Idempotent."""
        with self._lock:
            if self._closed:
                return
            self._closed = True
        self._server.shutdown()
        self._server.server_close()
        self._thread.join(timeout_s)

    def __enter__(self) -> "MetricsEndpoint":
        return self

    def __exit__(self, *exc) -> None:
        self.close()
