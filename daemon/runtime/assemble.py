"""Building the daemon's objects from a validated config.

Everything that turns config sections into objects lives here, so the service only wires and runs
them: the core parts (:func:`build_core`), the link controller (:func:`build_controller`), the
estimate source (:func:`make_driver`), the state keeper and the recorder (:func:`open_state`,
:func:`open_recorder`) and the simulated transmitter's follower (:func:`follower_factory`,
:class:`FollowerMapProvider`), and the transmitter side of ``brimline tx``: its sink
(:func:`open_sink`; :func:`open_loopback_sink` for the single-radio loopback) and its loop
(:func:`build_tx`). A part that rejects its section's values becomes one
:class:`~brimline.daemon.errors.ConfigError` naming the section.
"""

from __future__ import annotations

import math
import time
from typing import Any, Callable

from brimline.daemon.core.change import ChangeControl
from brimline.daemon.core.controller import LinkController
from brimline.daemon.core.estimator import Estimator
from brimline.daemon.core.outer import OuterLoop
from brimline.daemon.errors import ConfigError, SinkError, SourceError
from brimline.daemon.net.curve import follower_keys
from brimline.daemon.net.follower import Follower
from brimline.daemon.net.publisher import StatusPublisher
from brimline.daemon.records import LoadMap
from brimline.daemon.runtime.config import Config
from brimline.daemon.runtime.transmitter import TxLoop
from brimline.daemon.wire.recording import RecordWriter
from brimline.daemon.wire.sigmf import CaptureWriter
from brimline.daemon.wire.state import StateKeeper, StateStore
from brimline.drivers.link.frame import make_plan
from brimline.drivers.sinks.base import Sink
from brimline.drivers.sinks.radio import RadioSink
from brimline.drivers.sinks.sigmf import SigmfSink
from brimline.drivers.sinks.stream import IqStreamSink
from brimline.drivers.sources.iq import IqDriver
from brimline.drivers.sources.iqstream import IqStreamDriver
from brimline.drivers.sources.pushed import PushedDriver
from brimline.drivers.sources.radio import RadioDriver
from brimline.drivers.sources.replay import ReplayDriver
from brimline.drivers.sources.sim import SimDriver

__all__ = ["build_core", "build_controller", "make_driver", "open_state", "open_recorder",
           "open_iq_capture", "follower_factory", "FollowerMapProvider", "open_sink",
           "open_loopback_sink", "build_tx"]


def build_core(config: Config):
    """Build the tone plan, loader, estimator and change control a config describes.

    Returns
    -------
    tuple
        ``(plan, loader, estimator, change)``.

    Raises
    ------
    ConfigError
        When a part rejects its section's values (names the section and the problem).
    """
    def part(section: str, build):
        try:
            return build()
        except ValueError as exc:
            text = str(exc)
            prefix = "" if text.startswith(f"{section}.") else f"{section}: "
            raise ConfigError(f"{prefix}{text}") from None

    plan = part("link", lambda: make_plan(**config.link.model_dump()))
    loader = part("loading", config.loading.loader)
    estimator = part("estimator", lambda: Estimator(**config.estimator.model_dump()))
    change = part("change", lambda: ChangeControl(loader, **config.change.model_dump()))
    return plan, loader, estimator, change


def build_controller(config: Config, plan, loader, estimator, change, *, epoch: str,
                     next_seq: int = 0, restored: LoadMap | None = None,
                     reserve: Callable[[int], None] | None = None,
                     start_s: float | None = None) -> LinkController:
    """The :class:`LinkController` of a config, around parts made by :func:`build_core`.

    Parameters
    ----------
    config : Config
        Validated configuration (``fallback``, ``service.lead_frames`` and ``outer`` are
        used).
    plan, loader, estimator, change
        What :func:`build_core` returned (the loader gives the maps' SNR gap).
    epoch, next_seq, restored, reserve, start_s
        As for :class:`LinkController`.
    """
    fb = config.fallback
    outer = None if config.outer is None else OuterLoop(**config.outer.model_dump())
    return LinkController(plan, estimator, change, gap_db=float(loader.gap_db), epoch=epoch,
                          next_seq=next_seq, restored=restored,
                          lead_frames=config.service.lead_frames,
                          stale_after_s=fb.stale_after_s, fallback_bits=fb.bits,
                          fallback_power_db=fb.power_db, reserve=reserve, start_s=start_s,
                          outer=outer)


def make_driver(config: Config, plan, map_provider=None, capture: CaptureWriter | None = None):
    """Build the driver named by ``config.driver.kind``.

    Parameters
    ----------
    config : Config
        Validated configuration.
    plan : TonePlan
        Tone plan built from ``config.link``.
    map_provider : callable, optional
        For the simulator: returns the map the transmitter should use now.
    capture : CaptureWriter, optional
        The IQ capture (:func:`open_iq_capture`) for a source that feeds one; the caller keeps
        it and closes it after the driver.

    Raises
    ------
    SourceError
        When the source cannot be opened (file missing, device absent, library missing).
    """
    d = config.driver
    kind = d.kind
    section = d.selected().model_dump()
    if kind == "sim":
        return SimDriver(plan=plan, map_provider=map_provider, **section)
    if kind == "replay":
        return ReplayDriver(**section)
    if kind == "iq":
        return IqDriver(plan=plan, capture=capture, **section)
    if kind == "radio":
        if section["frame_rate_hz"] is None:  # the transmitter heard runs this file's tx:
            section["frame_rate_hz"] = config.tx.frame_rate_hz
        return RadioDriver(plan=plan, emulated=config.emulated.model_dump(), capture=capture,
                           **section)
    if kind == "pushed":
        return PushedDriver(plan=plan, **section)
    if kind == "iq_stream":
        return IqStreamDriver(plan=plan, **section)
    raise SourceError(f"driver.kind={kind!r} is not a known source")  # pragma: no cover


def open_state(config: Config) -> StateKeeper | None:
    """The state keeper of ``service.state_path`` (None when the config keeps no state)."""
    path = config.service.state_path
    if path is None:
        return None
    return StateKeeper(StateStore(path))


def open_recorder(config: Config, plan) -> RecordWriter | None:
    """The recorder of the ``record`` section (None when ``record.path`` is null).

    Raises
    ------
    RecordingError
        When the file exists already or cannot be created.
    """
    section = config.record.writer_arguments()
    if section.get("path") is None:
        return None
    return RecordWriter(meta={"plan_id": plan.plan_id}, **section)


def open_iq_capture(config: Config, plan) -> CaptureWriter | None:
    """The SigMF IQ capture of ``record.iq`` (None when ``record.iq.path`` is null).

    The capture carries the link's sample rate, centre frequency (when set) and tone plan
    (the ``brimline:tone_plan`` extension), and the wall time of its start.

    Raises
    ------
    RecordingError
        When the capture exists already or cannot be created.
    """
    section = config.record.iq
    if section.path is None:
        return None
    center = getattr(plan, "center_hz", math.nan)
    return CaptureWriter(section.path, sample_rate_hz=plan.sample_rate_hz,
                         datatype=section.datatype,
                         center_hz=None if math.isnan(center) else center, plan=plan,
                         description=f"brimline IQ capture, driver.kind={config.driver.kind}",
                         datetime_s=time.time())


def follower_factory(config: Config, plan, endpoints: dict[str, str],
                     context=None) -> Callable[[], Follower]:
    """A function that makes a :class:`Follower` of a daemon's maps (call it on its own thread).

    Parameters
    ----------
    config : Config
        Validated configuration (the follower checks maps against ``loading``).
    plan : TonePlan
        The daemon's tone plan.
    endpoints : dict
        The daemon's bound ``maps``, ``snapshots`` and ``acks`` endpoints.
    context : zmq.Context, optional
        Context for the follower's sockets.
    """
    def make() -> Follower:
        return Follower.for_daemon(config.publish, config.loading, plan=plan,
                                   map_endpoint=endpoints["maps"],
                                   snapshot_endpoint=endpoints["snapshots"],
                                   ack_endpoint=endpoints["acks"], context=context,
                                   **follower_keys(config.publish))  # CURVE: the daemon's pair
    return make


class FollowerMapProvider:
    """Map provider for the simulated transmitter: a real :class:`Follower` on loopback.

    Called on the driver thread once per frame. The first call creates the follower there (its
    sockets belong to that thread); every call polls it without blocking and returns the map it
    holds. :meth:`close` must run on the same thread (the service's driver thread does it).
    """

    def __init__(self, make_follower: Callable[[], Any]) -> None:
        self._make = make_follower
        self._follower = None
        self._closed = False

    def __call__(self, frame: int | None = None) -> LoadMap | None:
        # Live behaviour: the map the follower holds goes out at once (``frame`` unused).
        if self._closed:
            return None
        if self._follower is None:
            self._follower = self._make()
        adopted = self._follower.poll(0)
        if adopted is not None:
            # The simulated transmitter applies a map at its effective frame: say so.
            self._follower.ack(adopted.effective_frame, adopted.created_s, adopted.seq)
        return self._follower.current

    @property
    def follower(self):
        """The follower, once created (None before the first call)."""
        return self._follower

    def close(self) -> None:
        """Close the follower (on the thread that created it). Idempotent."""
        self._closed = True
        if self._follower is not None:
            self._follower.close()


def open_sink(config: Config, plan, *, device_object: Any = None,
              context=None) -> Sink:
    """The transmit sink named by ``config.tx.sink``.

    Parameters
    ----------
    config : Config
        Validated configuration (``tx``, ``emulated`` and ``link`` are used).
    plan : LinkPlan
        The tone plan (sample rate, centre frequency).
    device_object : object, optional
        An opened device for the radio sink (tests inject fakes).
    context : zmq.Context, optional
        Context for the stream sink's socket.

    Raises
    ------
    SinkError
        When the sink cannot be opened (library or device missing, file exists, bad endpoint).
    """
    tx = config.tx
    if tx.sink == "radio":
        return RadioSink(sample_rate_hz=plan.sample_rate_hz, center_hz=plan.center_hz,
                         attenuation_db=tx.attenuation_db, backend=tx.backend,
                         device=tx.device, uri=tx.uri, emulated=config.emulated.model_dump(),
                         device_object=device_object, reopen_backoff_s=tx.reopen_backoff_s,
                         reopen_backoff_max_s=tx.reopen_backoff_max_s,
                         reopen_max_attempts=tx.reopen_max_attempts)
    if tx.sink == "sigmf":
        return SigmfSink(tx.path, sample_rate_hz=plan.sample_rate_hz, center_hz=plan.center_hz)
    if tx.sink == "stream":
        return IqStreamSink(tx.stream_endpoint, pattern=tx.stream_pattern, bind=tx.stream_bind,
                            context=context)
    raise SinkError(f"tx.sink={tx.sink!r} is not a known sink")  # pragma: no cover


def open_loopback_sink(config: Config, plan) -> RadioSink:
    """The transmit sink of the single-radio loopback (``driver.radio.transmit``).

    A supervised :class:`RadioSink` on ``driver.radio``'s backend, device and URI with its
    ``tx_attenuation_db``, rebuilt with its ``backoff_s``, ``backoff_max_s`` and
    ``max_attempts`` (see :mod:`brimline.daemon.runtime.loopback`).

    Raises
    ------
    SinkError
        When the device cannot be opened (the message names ``driver.radio.uri``).
    """
    r = config.driver.radio
    return RadioSink(sample_rate_hz=plan.sample_rate_hz, center_hz=plan.center_hz,
                     attenuation_db=r.tx_attenuation_db, backend=r.backend, device=r.device,
                     uri=r.uri, emulated=config.emulated.model_dump(),
                     reopen_backoff_s=r.backoff_s, reopen_backoff_max_s=r.backoff_max_s,
                     reopen_max_attempts=r.max_attempts, where="driver.radio")


def build_tx(config: Config, plan, sink: Sink, *, status: bool = True, context=None,
             **follower_kwargs) -> TxLoop:
    """The transmitter loop of ``brimline tx`` around ``sink``.

    Its follower is :meth:`Follower.for_daemon` of the config's ``publish`` and ``loading``,
    a CURVE client with ``tx.curve_daemon_key`` and ``tx.curve_own_key`` when they are set
    (``follower_kwargs`` override, e.g. endpoints, ``clock``, keys); its status socket binds
    ``tx.status_endpoint`` (``status=False``: none). The caller owns the loop and closes it
    (which silences the sink).
    """
    tx = config.tx
    clock = follower_kwargs.get("clock")
    keys = {} if tx.curve_daemon_key is None else {
        "curve_server_key": tx.curve_daemon_key, "curve_client_key": tx.curve_own_key}
    keys.update(follower_kwargs)
    follower = Follower.for_daemon(config.publish, config.loading, plan=plan, context=context,
                                   **keys)
    publisher = None
    try:
        if status:
            publisher = StatusPublisher(endpoint=tx.status_endpoint, rate_hz=tx.status_rate_hz,
                                        context=context)
        extra = {} if clock is None else {"clock": clock}
        return TxLoop(plan=plan, follower=follower, sink=sink, frame_rate_hz=tx.frame_rate_hz,
                      default_bits=tx.default_bits, backoff_db=tx.backoff_db,
                      max_tone_db=tx.max_tone_db, max_total_db=tx.max_total_db,
                      hold_s=tx.hold_s, on_loss=tx.on_loss, max_lead_frames=tx.max_lead_frames,
                      seed=tx.seed, status=publisher, **extra)
    except BaseException:
        if publisher is not None:
            publisher.close()
        follower.close()
        raise
