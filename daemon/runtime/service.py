"""The daemon loop: estimates in, maps and status out.

Threads and sockets
-------------------
Two threads own sockets, each its own (ZeroMQ sockets never cross threads); a third, socketless
one (:class:`~brimline.daemon.wire.state.StateKeeper`'s writer) saves the last map, so that fsync is
almost never on the loop:

* the **driver thread** iterates ``driver.frames()``, encodes each :class:`Estimate` with the
  codec and sends it to the main thread over an ``inproc`` PAIR socket. When the source ends or
  raises, it sends one control message saying so and closes its socket. In simulation the
  driver's transmitter follows the published maps through a real :class:`Follower`, created on
  this thread on first use (see :class:`FollowerMapProvider`).
* the **main thread** owns every other socket (maps, snapshots, heartbeats, status,
  acknowledgements, the inproc receiving end) and waits on all of them with one ``zmq.Poller``
  whose timeout is the nearest deadline (heartbeat, status, staleness, the caller's stop time).

Time model
----------
The numerical core (estimator, change control) gets ``now_s`` as an argument. Which clock it
is, is a per-source choice (``service.clock``; ``auto`` picks it):

* ``source`` (sim, replay, recorded IQ): ``now_s`` is the estimate's own ``time_s``. Replay and
  the simulator therefore make the same decisions however fast they run, and replaying a file
  twice gives the same maps byte for byte. Between estimates (a silent source), the service
  extends the source time by the monotonic time elapsed since the last estimate arrived, only
  to notice staleness.
* ``monotonic`` (radio): ``now_s`` is the daemon's monotonic clock at arrival.

Heartbeats and the status period are I/O pacing and always run on the monotonic clock.

Shutdown order
--------------
``close()``: stop the driver (``driver.close()``, the driver thread leaves at its next frame),
join the driver thread with a timeout, publish a final status, join the state writer thread and
save the last map, close the recording (flushed), close the main thread's sockets (explicit
LINGER), terminate the context if the service created it. Idempotent.
"""

from __future__ import annotations

import collections
import json
import logging
import math
import threading
import time
from typing import Any, Callable

import numpy as np
import zmq

from brimline.daemon.core.change import ChangeControl
from brimline.daemon.core.estimator import Estimator
from brimline.daemon.errors import BrimlineError, ConfigError, ProtocolError, SourceError
from brimline.daemon.net.curve import follower_keys
from brimline.daemon.net.follower import Follower
from brimline.daemon.net.publisher import MapPublisher, StatusPublisher
from brimline.daemon.records import Allocation, DecisionKind, Estimate, LoadMap
from brimline.daemon.runtime.config import Config
from brimline.daemon.runtime.status import Change, build_status, summary_line
from brimline.daemon.wire import codec
from brimline.daemon.wire.recording import RecordWriter
from brimline.daemon.wire.state import StateKeeper, StateStore, new_epoch
from brimline.drivers.link.frame import make_plan
from brimline.drivers.sources.iq import IqDriver
from brimline.drivers.sources.radio import RadioDriver
from brimline.drivers.sources.replay import ReplayDriver
from brimline.drivers.sources.sim import SimDriver

__all__ = ["Service", "FollowerMapProvider", "make_driver", "build_core"]

log = logging.getLogger("brimline.service")

_CONTROL = b"_driver"  # topic of driver-thread control messages on the inproc socket
_HISTORY = 16  # changes kept for the status stream


def make_driver(config: Config, plan, map_provider=None):
    """Build the driver named by ``config.driver.kind``.

    Parameters
    ----------
    config : Config
        Validated configuration.
    plan : TonePlan
        Tone plan built from ``config.link``.
    map_provider : callable, optional
        For the simulator: returns the map the transmitter should use now.

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
        return IqDriver(plan=plan, **section)
    if kind == "radio":
        return RadioDriver(plan=plan, **section)
    raise SourceError(f"driver.kind={kind!r} is not a known source")  # pragma: no cover


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


class Service:
    """The daemon: one driver thread feeding a single-threaded core and its sockets.

    Parameters
    ----------
    config : Config
        Validated configuration.
    context : zmq.Context, optional
        Context for every socket; by default the service creates (and terminates) its own.
    clock : callable
        Monotonic clock in seconds (injected by tests).
    driver : Driver, optional
        Source of estimates to use instead of the one ``config.driver`` names (tests, tools).
    follow : bool
        For the simulator: let its transmitter follow the published maps through a
        :class:`Follower` (the closed loop). Default True.

    Notes
    -----
    Use as a context manager: ``with Service(cfg) as svc: svc.run(duration_s=10)``.
    """

    def __init__(self, config: Config, *, context: zmq.Context | None = None,
                 clock: Callable[[], float] = time.monotonic, driver=None,
                 follow: bool = True) -> None:
        self.config = config
        self._clock = clock
        self._own_context = context is None
        self._context = context
        self._given_driver = driver
        self._follow = follow
        self.plan, self.loader, self.estimator, self.change = build_core(config)
        self._plan_id = self.plan.plan_id  # a hash: computed once, compared per frame
        self._gap_db = float(self.loader.gap_db)
        self._lead_frames = int(config.service.lead_frames)
        # The plan's data tones as the bytes an Estimate's int16 tone_index must equal: one
        # memcmp per frame instead of an elementwise comparison.
        self._tone_bytes = np.asarray(self.plan.data_tones, dtype=np.int16).tobytes()
        if self.config.service.clock == "auto":
            self.clock_mode = "monotonic" if config.driver.kind == "radio" else "source"
        else:
            self.clock_mode = self.config.service.clock

        self.driver = None
        self.epoch = ""
        self.current_map: LoadMap | None = None
        self.current_kind: str | None = None
        self.maps_published: collections.Counter[str] = collections.Counter()
        self.changes: collections.deque[Change] = collections.deque(maxlen=_HISTORY)
        self.frames = {"received": 0, "accepted": 0, "decode_errors": 0, "last_frame": -1}
        self.unpublished = 0  # maps not sent because no state save could cover their seq
        self.state_unsaved = False  # the last attempt to save the seq lease failed
        self.rejected: collections.Counter[str] = collections.Counter()  # by estimator reason
        self.driver_state = "starting"
        self.driver_error: str | None = None
        self.fallback_active = False
        self.stale = False
        self.acks: dict[str, dict] = {}
        self.last_status: dict | None = None

        self._next_seq = 0
        self._unrecorded: list = []  # encoded maps published but not yet recorded
        self._last_valid_s: float | None = None  # core time of the newest accepted estimate
        self._last_arrival_s: float | None = None  # source time and monotonic arrival of the
        self._last_arrival_wall: float | None = None  # newest estimate (staleness while silent)
        self._last_tracked = None
        self._core_floor_s = -math.inf
        self._started_wall = 0.0
        self._thread: threading.Thread | None = None
        self._inproc_addr = f"inproc://brimline-estimates-{id(self):x}"
        self._rx = None
        self._poller = None
        self._io = None  # protocol objects (publisher, status, state, recorder)
        self._provider: FollowerMapProvider | None = None
        self._started = False
        self._closed = False

    # ------------------------------------------------------------------ life cycle

    def __enter__(self) -> "Service":
        self.start()
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def start(self) -> None:
        """Load state (saving the first seq lease), bind the sockets, open the recording and
        start the driver thread.

        Raises
        ------
        SourceError
            When the estimate source cannot be opened.
        BrimlineError
            Socket, state or recording problems (already one line each).
        """
        if self._closed:
            raise RuntimeError("service is closed")
        if self._started:
            return
        self._started = True
        if self._context is None:
            self._context = zmq.Context()
        try:
            self._io = _Io(self.config, self._context, self.plan)
            self.epoch, self._next_seq, restored = self._io.epoch, self._io.next_seq, \
                self._io.restored
            if restored is not None:
                self.current_map = restored
                self.current_kind = "restored"
                self._io.publish_map(restored, prime=True)
                log.info("restored map seq %d (epoch %s) from %s", restored.seq, self.epoch,
                         self.config.service.state_path)
            self._rx = self._context.socket(zmq.PAIR)
            self._rx.setsockopt(zmq.LINGER, 0)
            self._rx.setsockopt(zmq.RCVHWM, 64)
            self._rx.bind(self._inproc_addr)
            self._poller = zmq.Poller()
            self._poller.register(self._rx, zmq.POLLIN)
            for sock in self._io.poll_sockets():
                self._poller.register(sock, zmq.POLLIN)
            if self._given_driver is not None:
                self.driver = self._given_driver
            else:
                if self.config.driver.kind == "sim" and self._follow:
                    self._provider = FollowerMapProvider(self._io.follower_factory())
                self.driver = make_driver(self.config, self.plan, self._provider)
        except BaseException:
            self.close()
            raise
        self._started_wall = self._clock()
        self._thread = threading.Thread(target=self._driver_main, name="brimline-driver",
                                        daemon=True)
        self._thread.start()
        self.driver_state = "running"
        log.info("started: source %s, clock %s, epoch %s, maps on %s, status on %s",
                 getattr(self.driver, "name", "driver"), self.clock_mode, self.epoch,
                 self.endpoints.get("maps"), self.endpoints.get("status"))

    @property
    def endpoints(self) -> dict[str, str]:
        """Actual bound endpoints (ports resolved when the config asked for port 0)."""
        return {} if self._io is None else self._io.endpoints()

    def close(self) -> None:
        """Ordered shutdown (see the module docstring). Idempotent."""
        if self._closed:
            return
        self._closed = True
        if self.driver is not None:
            try:
                self.driver.close()
            except Exception:  # noqa: BLE001 - a driver's close must not stop the shutdown
                log.exception("driver close failed")
        if self._thread is not None:
            self._thread.join(self.config.service.driver_join_s)
            if self._thread.is_alive():
                log.warning("driver thread did not stop within %.1f s",
                            self.config.service.driver_join_s)
        if self._io is not None:
            if self._started and self.driver_state not in ("failed", "ended"):
                self.driver_state = "stopped"
            try:
                self.publish_status()
            except BrimlineError as exc:
                log.warning("final status not sent: %s", exc)
            self._io.close(self.current_map)
        if self._rx is not None:
            self._rx.close(linger=0)
        if self._own_context and self._context is not None:
            self._context.term()

    # ------------------------------------------------------------------ driver thread

    def _driver_main(self) -> None:
        tx = self._context.socket(zmq.PAIR)
        tx.setsockopt(zmq.LINGER, 0)
        tx.setsockopt(zmq.SNDHWM, 64)
        state, error = "ended", None
        try:
            tx.connect(self._inproc_addr)
            for estimate in self.driver.frames():
                frames = codec.encode(codec.TOPIC_ESTIMATE, estimate)
                # Block while the main thread is busy (replay and sim must not lose frames),
                # but wake up to notice close().
                while not tx.poll(100, zmq.POLLOUT):
                    if self.driver.closed:
                        return
                tx.send_multipart(frames, copy=False)
                if self.driver.closed:
                    break
        except BrimlineError as exc:
            state, error = "failed", str(exc)
        except Exception as exc:  # noqa: BLE001 - any driver bug is reported, not a crash
            state, error = "failed", f"{type(exc).__name__}: {exc}"
            log.exception("driver %s failed", getattr(self.driver, "name", "driver"))
        finally:
            try:
                msg = json.dumps({"state": state, "error": error}).encode()
                if tx.poll(500, zmq.POLLOUT):
                    tx.send_multipart([_CONTROL, msg])
            finally:
                if self._provider is not None:
                    self._provider.close()
                tx.close(linger=0)

    # ------------------------------------------------------------------ main thread

    def core_now(self) -> float:
        """Time fed to the core now (see the module docstring's time model), s."""
        wall = self._clock()
        if self.clock_mode == "monotonic" or self._last_arrival_s is None:
            return wall if self.clock_mode == "monotonic" else wall - self._started_wall
        return self._last_arrival_s + (wall - self._last_arrival_wall)

    def run(self, duration_s: float | None = None, *, stop: threading.Event | None = None,
            on_status: Callable[[dict], None] | None = None) -> None:
        """Run the loop until ``duration_s`` (monotonic) passes, ``stop`` is set or the source ends.

        Parameters
        ----------
        duration_s : float, optional
            Bound on the run time in seconds.
        stop : threading.Event, optional
            Set (e.g. by a signal handler) to finish the current step and return.
        on_status : callable, optional
            Called with every status message published (the CLI's live line).
        """
        self.start()
        end = None if duration_s is None else self._clock() + duration_s
        while not (stop is not None and stop.is_set()):
            now = self._clock()
            if end is not None and now >= end:
                break
            timeout = self.config.service.poll_s
            if end is not None:
                timeout = min(timeout, max(0.0, end - now))
            status = self.step(timeout)
            if status is not None and on_status is not None:
                on_status(status)
            if self.driver_state in ("ended", "failed") and not self._pending():
                if self.driver_state == "ended":
                    break
                # A failed source: keep serving the last map, status and fallback until told
                # to stop (the operator sees driver_failed in the status).

    def _pending(self) -> bool:
        return bool(self._rx.poll(0, zmq.POLLIN))

    def step(self, timeout_s: float = 0.05) -> dict | None:
        """Wait up to ``timeout_s`` for input, handle it, and run what is due.

        Returns
        -------
        dict or None
            The status message when one was published in this step.
        """
        # Heartbeats first: the call sends one if due and says when the next is due, which
        # bounds the poll so heartbeats stay on time however quiet the sockets are.
        timeout = min(timeout_s, self._io.heartbeat_due(self._clock()))
        events = dict(self._poller.poll(int(math.ceil(max(0.0, timeout) * 1000))))
        if self._rx in events:
            for _ in range(256):  # bounded so timers stay on time under a flood
                try:
                    frames = self._rx.recv_multipart(zmq.NOBLOCK, copy=False)
                except zmq.Again:
                    break
                self._handle_inproc(frames)
        for sock in self._io.poll_sockets():
            if sock in events:
                for ack in self._io.handle(sock):
                    self._note_ack(ack)
        # Staleness while the source is silent.
        if self.driver_state in ("running", "failed"):
            self._check_stale(self.core_now())
            self._record_maps()
        if self._io.status_due(self._clock()):
            return self.publish_status()
        return None

    def _handle_inproc(self, frames) -> None:
        if frames and bytes(getattr(frames[0], "buffer", frames[0])) == _CONTROL:
            msg = json.loads(bytes(getattr(frames[1], "buffer", frames[1])))
            self.driver_state = msg["state"]
            self.driver_error = msg.get("error")
            if self.driver_state == "failed":
                log.error("source %s stopped: %s", getattr(self.driver, "name", "driver"),
                          self.driver_error)
            else:
                log.info("source %s ended", getattr(self.driver, "name", "driver"))
            return
        try:
            _topic, estimate = codec.decode(frames)
            if not isinstance(estimate, Estimate):
                raise ProtocolError(f"expected an estimate, got {type(estimate).__name__}")
        except ProtocolError as exc:
            self.frames["decode_errors"] += 1
            log.warning("dropped an undecodable estimate: %s", exc)
            return
        self.process(estimate, frames=frames)

    def process(self, estimate: Estimate, *, frames=None) -> LoadMap | None:
        """Run one estimate through estimator and change control; publish a map if one is made.

        Parameters
        ----------
        estimate : Estimate
            The estimate.
        frames : list, optional
            The estimate as the codec encoded it (the driver thread's hand-off), recorded as
            is instead of being encoded again.

        Returns
        -------
        LoadMap or None
            The map published for this estimate (the fallback map when the estimate revealed
            a stale gap and nothing newer replaced it), or None.

        Notes
        -----
        The recording is written after the maps are sent (estimate first, then the maps it
        caused), so disk writes are not on the path to the transmitter.
        """
        try:
            return self._process(estimate)
        finally:
            self._io.record_estimate(estimate, frames)
            self._record_maps()

    def _record_maps(self) -> None:
        for frames in self._unrecorded:
            self._io.record_frames(frames)
        self._unrecorded.clear()

    def _process(self, estimate: Estimate) -> LoadMap | None:
        if self.clock_mode == "source":
            # Never earlier than a time already given to the core (a fallback sent while a
            # non-paced source was silent used extrapolated time).
            now_s = max(estimate.time_s, self._core_floor_s)
        else:
            now_s = self._clock()
        self.frames["received"] += 1
        self.frames["last_frame"] = max(self.frames["last_frame"], estimate.frame)
        self._last_arrival_s = now_s
        self._last_arrival_wall = self._clock()
        published = None
        if (estimate.plan_id != self._plan_id
                or estimate.tone_index.tobytes() != self._tone_bytes):
            # Received with another tone plan: no map of this daemon could describe it.
            self.rejected["other_plan"] += 1
            self._check_stale(now_s)
            return None
        # A gap in the source's own time longer than stale_after_s means the link was stale
        # during the gap: the fallback map goes first, as a live daemon would have sent it.
        stale_after = self.config.fallback.stale_after_s
        if (self._last_valid_s is not None and not self.fallback_active
                and now_s - self._last_valid_s >= stale_after):
            published = self._enter_fallback(self._last_valid_s + stale_after)
        rejected = self.estimator.update(estimate, now_s)
        if rejected is not None:
            self.rejected[rejected] += 1
            self._check_stale(now_s)
            return published
        self.frames["accepted"] += 1
        self._last_valid_s = now_s
        self.stale = False
        tracked = self.estimator.tracked(now_s)
        if tracked is None:
            return published
        self._last_tracked = tracked
        decision = self.change.decide(tracked, now_s)
        if decision.kind is DecisionKind.KEEP:
            return published
        return self._publish(decision.allocation, decision.kind.value, decision.reason, now_s)

    def _check_stale(self, now_s: float) -> None:
        stale_after = self.config.fallback.stale_after_s
        if self._last_valid_s is None:
            since = self._clock() - self._started_wall
        else:
            since = now_s - self._last_valid_s
        if since >= stale_after:
            self.stale = True
            if not self.fallback_active:
                self._enter_fallback(now_s)

    def _enter_fallback(self, now_s: float) -> LoadMap | None:
        fb = self.config.fallback
        n = self.plan.data_tones.size
        p_lin = 10.0 ** (fb.power_db / 10.0)
        alloc = Allocation(bits=np.full(n, fb.bits), power=np.full(n, p_lin),
                           total_bits=n * fb.bits, total_power=n * p_lin, margin_db=math.nan)
        reason = (f"no valid estimate for {fb.stale_after_s:g} s: safe map "
                  f"({fb.bits} bits, {fb.power_db:+g} dB on every tone)")
        self._core_floor_s = max(self._core_floor_s, now_s)
        self.change.force(alloc, DecisionKind.FALLBACK, reason, now_s)
        self.estimator.reset("stale")
        self.fallback_active = True
        self.stale = True
        log.warning("fallback: %s", reason)
        return self._publish(alloc, DecisionKind.FALLBACK.value, reason, now_s, fallback=True)

    def _publish(self, alloc: Allocation, kind: str, reason: str, now_s: float, *,
                 fallback: bool = False) -> LoadMap | None:
        # The seq must be covered by a saved lease before it goes out (free but once per
        # state.LEASE maps); without one the map is held back, so no seq is ever reused.
        try:
            self._io.reserve(self._next_seq)
        except BrimlineError as exc:
            self.unpublished += 1
            if not self.state_unsaved:
                log.error("new maps held back: %s", exc)
            self.state_unsaved = True
            return None
        self.state_unsaved = False
        # The codec and the record refuse bad values; the loader's arrays are passed as they
        # are (the record converts and freezes them once).
        m = LoadMap(epoch=self.epoch, seq=self._next_seq,
                    effective_frame=self.frames["last_frame"] + self._lead_frames,
                    created_s=now_s, plan_id=self._plan_id, tone_index=self.plan.data_tones,
                    bits=alloc.bits, power_lin=alloc.power,
                    total_bits=alloc.total_bits, margin_db=alloc.margin_db,
                    gap_db=self._gap_db, reason=reason, fallback=fallback)
        self._next_seq += 1
        frames = self._io.publish_map(m)
        # Everything below is bookkeeping after the map is on its way.
        self._io.save_state(m, frames)
        self._unrecorded.append(frames)
        if self.fallback_active and not fallback:
            self.fallback_active = False
            log.info("estimates resumed: leaving the fallback map")
        self.current_map, self.current_kind = m, kind
        self.maps_published[kind] += 1
        self.changes.append(Change(now_s, kind, reason, m.seq))
        if log.isEnabledFor(logging.INFO):
            margin = f"{m.margin_db:.1f} dB" if math.isfinite(m.margin_db) else "unknown"
            log.info("map %d (%s, %d bits/symbol, margin %s): %s", m.seq, kind, m.total_bits,
                     margin, reason)
        return m

    def _note_ack(self, ack: dict) -> None:
        # Acknowledgements carry no follower name (PUSH/PULL); they are summed as one stream.
        entry = self.acks.setdefault("followers", {"seq": -1, "count": 0, "wall": 0.0})
        entry["seq"] = max(entry["seq"], int(ack.get("seq", -1)))
        entry["frame"] = int(ack.get("frame", -1))
        entry["count"] += 1
        entry["wall"] = self._clock()

    def status(self) -> dict:
        """The status message for the current state (see :mod:`brimline.daemon.runtime.status`)."""
        wall = self._clock()
        now = self.core_now()
        tracked = self._last_tracked
        age = None if self._last_valid_s is None else max(0.0, now - self._last_valid_s)
        tracking = {k: v for k, v in self.estimator.counters.items()
                    if k not in self.rejected and k != "accepted"}
        return build_status(
            time_s=now, epoch=self.epoch,
            driver={"name": getattr(self.driver, "name", "driver"), "state": self.driver_state,
                    "error": self.driver_error,
                    "counters": dict(getattr(self.driver, "counters", {}))},
            frames={**self.frames, "rejected": dict(self.rejected), "tracking": tracking},
            estimate_age_s=age,
            tone_index=None if tracked is None else tracked.tone_index,
            snr_db=None if tracked is None else tracked.snr_db,
            current_map=self.current_map, current_kind=self.current_kind,
            maps_published=self.maps_published, changes=list(self.changes),
            acks={k: {"seq": v["seq"], "age_s": wall - v["wall"]} for k, v in self.acks.items()},
            stale=self.stale, state_unsaved=self.state_unsaved,
            protocol_errors=self._io.protocol_errors() if self._io is not None else None,
            symbol_rate_hz=self.plan.sample_rate_hz / self.plan.symbol_len)

    def publish_status(self) -> dict:
        """Build and publish one status message now; returns it."""
        st = self.status()
        self._io.publish_status(st)
        self.last_status = st
        log.debug("status %s", summary_line(st))
        return st


class _Io:
    """The protocol objects of the main thread, behind the few calls the loop needs.

    Owns the state keeper (opened first: its epoch goes to the map publisher, so heartbeats and
    snapshots name it before the first map), the map publisher (maps, heartbeats, snapshots,
    acknowledgements), the status publisher and the recorder. Everything here runs on the main
    thread (the state keeper's writer thread aside).

    Attributes
    ----------
    epoch : str
        The epoch (restored or new).
    next_seq : int
        First sequence number this run may use.
    restored : LoadMap or None
        The saved map, when it is for this config's tone plan.
    """

    def __init__(self, config: Config, context: zmq.Context, plan) -> None:
        self._config = config
        self._context = context
        self._plan = plan
        self.maps = None
        self.status = None
        self.state = None
        self.recorder = None
        self._closed = False
        try:
            self.state = _open_state(config)
            self.epoch, self.next_seq, self.restored = self._restore()
            self.maps = MapPublisher(context=context, epoch=self.epoch,
                                     **config.publish.model_dump())
            self.status = StatusPublisher(context=context, curve=self.maps.curve,
                                          **config.status.model_dump())
            self.recorder = _open_recorder(config, plan)
        except BaseException:
            self.close(None)
            raise

    # -- state
    def _restore(self) -> tuple[str, int, LoadMap | None]:
        if self.state is None:
            return new_epoch(), 0, None
        epoch, next_seq, m = self.state.restore()
        if m is not None and m.plan_id != self._plan.plan_id:
            # Same epoch and sequence continue, but a map for another tone plan is not served.
            log.warning("saved map is for tone plan %s, this config's is %s: not restored",
                        m.plan_id, self._plan.plan_id)
            m = None
        return epoch, next_seq, m

    def reserve(self, seq: int) -> None:
        """Make ``seq`` publishable (a durable seq ceiling covers it). Raises StateError."""
        if self.state is not None:
            self.state.reserve(seq)

    def save_state(self, m: LoadMap, frames) -> None:
        if self.state is not None:
            self.state.submit(m, frames)

    # -- maps
    def publish_map(self, m: LoadMap, *, prime: bool = False):
        """Send ``m`` (or only adopt it for snapshots: ``prime``); the encoded frames."""
        if prime:
            self.maps.prime(m)
            return None
        return self.maps.publish(m)

    def heartbeat_due(self, wall_s: float) -> float:
        """Send a heartbeat if due; seconds until the next one."""
        return self.maps.tick(wall_s)

    def poll_sockets(self) -> list:
        return [s for s in (self.maps.snapshot_socket, self.maps.ack_socket) if s is not None]

    def handle(self, sock) -> list[dict]:
        if sock is self.maps.snapshot_socket:
            self.maps.handle_snapshot()
            return []
        return self.maps.poll_acks()

    def protocol_errors(self) -> dict[str, dict[str, int]]:
        """Messages the map publisher's sockets dropped, by socket and reason."""
        return self.maps.protocol_errors

    def endpoints(self) -> dict[str, str]:
        return {"maps": self.maps.map_endpoint, "snapshots": self.maps.snapshot_endpoint,
                "acks": self.maps.ack_endpoint, "status": self.status.endpoint}

    def follower_factory(self) -> Callable[[], Any]:
        """A function that makes a Follower of this daemon's maps (call it on its own thread)."""
        ld = self._config.loading
        kwargs = dict(plan=self._plan, map_endpoint=self.maps.map_endpoint,
                      snapshot_endpoint=self.maps.snapshot_endpoint,
                      ack_endpoint=self.maps.ack_endpoint, bits=list(ld.bits),
                      budget_db=ld.budget_db, cap_db=ld.cap_db, context=self._context,
                      **follower_keys(self._config.publish))  # CURVE: the daemon's own pair
        return lambda: Follower(**kwargs)

    # -- status
    def status_due(self, wall_s: float) -> bool:
        return self.status.due(wall_s)

    def publish_status(self, st: dict) -> None:
        self.status.publish(st)

    # -- recording
    def record_estimate(self, est: Estimate, frames=None) -> None:
        if self.recorder is not None:
            if frames is None:
                self.recorder.write(codec.TOPIC_ESTIMATE, est)
            else:
                self.recorder.write_frames(frames)

    def record_frames(self, frames) -> None:
        """Record an encoded message (a published map: the bytes that were sent)."""
        if self.recorder is not None:
            self.recorder.write_frames(frames)

    def close(self, last_map: LoadMap | None) -> None:
        """Save state, close the recording (flushed), then the sockets. Idempotent."""
        if self._closed:
            return
        self._closed = True
        if self.state is not None:
            self.state.close(last_map)
        if self.recorder is not None:
            self.recorder.close()
        for obj in (self.status, self.maps):
            if obj is not None:
                obj.close()


def _open_state(config: Config):
    path = config.service.state_path
    if path is None:
        return None
    return StateKeeper(StateStore(path))


def _open_recorder(config: Config, plan):
    section = config.record.model_dump()
    if section.get("path") is None:
        return None
    return RecordWriter(meta={"plan_id": plan.plan_id}, **section)
