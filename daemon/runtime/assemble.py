"""Building the daemon's objects from a validated config.

Everything that turns config sections into objects lives here, so the service only wires and runs
them: the core parts (:func:`build_core`), the link controller (:func:`build_controller`), the
estimate source (:func:`make_driver`), the state keeper and the recorder (:func:`open_state`,
:func:`open_recorder`) and the simulated transmitter's follower (:func:`follower_factory`,
:class:`FollowerMapProvider`). A part that rejects its section's values becomes one
:class:`~brimline.daemon.errors.ConfigError` naming the section.
"""

from __future__ import annotations

import math
import time
from typing import Any, Callable

from brimline.daemon.core.change import ChangeControl
from brimline.daemon.core.controller import LinkController
from brimline.daemon.core.estimator import Estimator
from brimline.daemon.errors import ConfigError, SourceError
from brimline.daemon.net.follower import Follower
from brimline.daemon.records import LoadMap
from brimline.daemon.runtime.config import Config
from brimline.daemon.wire.recording import RecordWriter
from brimline.daemon.wire.sigmf import CaptureWriter
from brimline.daemon.wire.state import StateKeeper, StateStore
from brimline.drivers.link.frame import make_plan
from brimline.drivers.sources.iq import IqDriver
from brimline.drivers.sources.radio import RadioDriver
from brimline.drivers.sources.replay import ReplayDriver
from brimline.drivers.sources.sim import SimDriver

__all__ = ["build_core", "build_controller", "make_driver", "open_state", "open_recorder",
           "open_iq_capture", "follower_factory", "FollowerMapProvider"]


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
        Validated configuration (``fallback`` and ``service.lead_frames`` are used).
    plan, loader, estimator, change
        What :func:`build_core` returned (the loader gives the maps' SNR gap).
    epoch, next_seq, restored, reserve, start_s
        As for :class:`LinkController`.
    """
    fb = config.fallback
    return LinkController(plan, estimator, change, gap_db=float(loader.gap_db), epoch=epoch,
                          next_seq=next_seq, restored=restored,
                          lead_frames=config.service.lead_frames,
                          stale_after_s=fb.stale_after_s, fallback_bits=fb.bits,
                          fallback_power_db=fb.power_db, reserve=reserve, start_s=start_s)


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
        return RadioDriver(plan=plan, **section)
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
                                   ack_endpoint=endpoints["acks"], context=context)
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

    def __call__(self) -> LoadMap | None:
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
