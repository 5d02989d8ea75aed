"""The daemon's outlets on the main thread: map and status publishers, state file, recorder,
and the optional metrics endpoint (fed each status message as it is published).

:class:`Outlets` holds the protocol objects the service's loop talks to, behind the few calls it
needs, and keeps the rule that a recording which cannot be written never stops the maps: the
first :class:`~brimline.daemon.errors.RecordingError` closes the recorder, logs one error line
and shows in :meth:`Outlets.recording_status` (the status message's ``recording`` field).
"""

from __future__ import annotations

import hashlib
import json
import logging

import zmq

from brimline.daemon.errors import BrimlineError, RecordingError
from brimline.daemon.net.metrics import MetricsEndpoint
from brimline.daemon.net.publisher import MapPublisher, StatusPublisher
from brimline.daemon.records import LoadMap
from brimline.daemon.runtime.assemble import open_recorder, open_state
from brimline.daemon.runtime.config import Config
from brimline.daemon.runtime.status import ALARMS
from brimline.daemon.wire.recording import recording_epoch
from brimline.daemon.wire.state import new_epoch

__all__ = ["Outlets"]

log = logging.getLogger("brimline.service")


class Outlets:
    """The protocol objects of the main thread, behind the few calls the loop needs.

    Owns the state keeper (opened first: its epoch goes to the map publisher, so heartbeats and
    snapshots name it before the first map), the map publisher (``maps``: maps, heartbeats,
    snapshots, acknowledgements), the status publisher (``status``) and the recorder.
    Everything here runs on the main thread (the state keeper's writer thread aside).

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
        self._plan = plan
        self._config = config
        #: Acknowledgements summed by follower stream: ``{"followers": {"seq", "count", ...}}``.
        self.acks: dict[str, dict] = {}
        self.maps = None
        self.status = None
        self.state = None
        self.recorder = None
        self.metrics: MetricsEndpoint | None = None
        self._record_path = config.record.path
        self._record_error: str | None = None
        self._closed = False
        try:
            self.state = open_state(config)
            self.epoch, self.next_seq, self.restored = self._restore()
            self.maps = MapPublisher(context=context, epoch=self.epoch,
                                     **config.publish.model_dump())
            self.status = StatusPublisher(context=context, curve=self.maps.curve,
                                          **config.status.model_dump())
            self.recorder = open_recorder(config, plan)
            if config.metrics.enabled:
                self.metrics = MetricsEndpoint(host=config.metrics.host,
                                               port=config.metrics.port, alarms=ALARMS)
        except BaseException:
            self.close(None)
            raise

    def _restore(self) -> tuple[str, int, LoadMap | None]:
        if self.state is None:
            return self._fresh_epoch(), 0, None
        epoch, next_seq, m = self.state.restore()
        if m is not None and m.plan_id != self._plan.plan_id:
            # Same epoch and sequence continue, but a map for another tone plan is not served.
            log.warning("saved map is for tone plan %s, this config's is %s: not restored",
                        m.plan_id, self._plan.plan_id)
            m = None
        return epoch, next_seq, m

    def _fresh_epoch(self) -> str:
        """A replay without saved state takes its recording's epoch (the same maps, byte for
        byte, on every replay); a simulation in fast (lockstep) mode one derived from the config
        sections that decide its maps, seed included (the same maps on every run); anything
        else a new random one."""
        driver = self._config.driver
        if driver.kind == "replay":
            try:
                return recording_epoch(driver.replay.path)
            except RecordingError:
                pass  # the replay driver reports the unreadable recording itself
        if driver.kind == "sim" and not driver.sim.realtime:
            # What decides the maps; not the sockets, the status stream or the recording.
            text = json.dumps(self._config.model_dump(
                mode="json", exclude={"publish", "status", "record"}), sort_keys=True)
            return hashlib.sha256(text.encode()).hexdigest()[:16]
        return new_epoch()

    def reserve(self, seq: int) -> None:
        """Make ``seq`` publishable (a durable seq ceiling covers it). Raises StateError."""
        if self.state is not None:
            self.state.reserve(seq)

    def save_state(self, m: LoadMap, frames) -> None:
        if self.state is not None:
            self.state.submit(m, frames)

    def heartbeat_due(self, wall_s: float) -> float:
        """Send a heartbeat if due; seconds until the next one."""
        return self.maps.tick(wall_s)

    def poll_sockets(self) -> list:
        return [s for s in (self.maps.snapshot_socket, self.maps.ack_socket,
                            self.maps.outcome_socket) if s is not None]

    def handle(self, sock, controller, now_s: float, wall_s: float) -> None:
        """Serve a readable socket: snapshot requests, acknowledgements (summed in
        :attr:`acks`, and given to ``controller.on_ack``, which measures the lead from them)
        or frame outcomes (given to ``controller`` at ``now_s``; undecodable ones are counted
        there too, so status ``outer.dropped`` shows them)."""
        if sock is self.maps.snapshot_socket:
            self.maps.handle_snapshot()
        elif sock is self.maps.outcome_socket:
            bad = self.maps.counters["bad_outcomes"]
            for outcome in self.maps.poll_outcomes():
                controller.on_outcome(outcome, now_s)
            for _ in range(self.maps.counters["bad_outcomes"] - bad):
                controller.count_bad_outcome()
        else:
            for ack in self.maps.poll_acks():
                self._note_ack(ack, wall_s)
                controller.on_ack(int(ack["seq"]), int(ack["frame"]))

    def _note_ack(self, ack: dict, wall_s: float) -> None:
        # Acknowledgements carry no follower name (PUSH/PULL); they are summed as one stream.
        entry = self.acks.setdefault("followers", {"seq": -1, "count": 0, "wall": 0.0})
        entry["seq"] = max(entry["seq"], int(ack.get("seq", -1)))
        entry["frame"] = int(ack.get("frame", -1))
        entry["count"] += 1
        entry["wall"] = wall_s

    def ack_status(self, wall_s: float) -> dict:
        """``{"followers": {"seq", "age_s"}}`` for the status message (empty before an ack)."""
        return {k: {"seq": v["seq"], "age_s": wall_s - v["wall"]} for k, v in self.acks.items()}

    def protocol_errors(self) -> dict[str, dict[str, int]]:
        """Messages the map publisher's sockets dropped, by socket and reason."""
        return self.maps.protocol_errors

    def endpoints(self) -> dict[str, str]:
        out = {"maps": self.maps.map_endpoint, "snapshots": self.maps.snapshot_endpoint,
               "acks": self.maps.ack_endpoint, "outcomes": self.maps.outcome_endpoint,
               "status": self.status.endpoint}
        if self.metrics is not None:
            out["metrics"] = self.metrics.url
        return out

    def publish_status(self, status: dict) -> None:
        """Send ``status`` on the status stream and hand the same dict to the metrics endpoint."""
        self.status.publish(status)
        if self.metrics is not None:
            self.metrics.update(status)

    # -- recording: a failure stops the recording, never the maps
    def record(self, topic: str, record, frames=None) -> None:
        """Record ``record`` on ``topic`` (or its encoded ``frames``) if the topic is kept."""
        if self.recorder is None:
            return
        try:
            if frames is None:
                self.recorder.write(topic, record)
            else:
                self.recorder.write_frames(frames)
        except RecordingError as exc:
            self._recording_failed(exc)

    def _recording_failed(self, exc: RecordingError) -> None:
        recorder, self.recorder = self.recorder, None
        self._record_error = str(exc)
        note = ""
        try:
            recorder.close()
        except (BrimlineError, OSError) as close_exc:  # the file is lost either way
            note = f" (closing it: {close_exc})"
        log.error("recording stopped, maps go on without it: %s%s", exc, note)

    def recording_status(self) -> dict:
        """``{"state": "off" | "on" | "failed", "path", "error"}`` for the status message."""
        if self._record_error is not None:
            state = "failed"
        else:
            state = "off" if self.recorder is None else "on"
        path = None if self._record_path is None else str(self._record_path)
        return {"state": state, "path": path, "error": self._record_error}

    def close(self, last_map: LoadMap | None) -> None:
        """Save state, close the recording (flushed), then the sockets. Idempotent."""
        if self._closed:
            return
        self._closed = True
        if self.state is not None:
            self.state.close(last_map)
        if self.recorder is not None:
            try:
                self.recorder.close()
            except (BrimlineError, OSError) as exc:
                log.error("recording not closed cleanly: %s", exc)
        for obj in (self.metrics, self.status, self.maps):
            if obj is not None:
                obj.close()
