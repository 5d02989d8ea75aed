"""publish_p99_ms: estimate into the daemon -> map decoded by a follower on loopback.

The clock starts when an estimate enters the service's per-estimate step (``Service.process``:
estimator update, change control, map building, publish, state save, recording) and stops when
a :class:`Follower` on another thread, connected over TCP loopback, has decoded, checked and
adopted the resulting map. Change control is replaced by one that reloads on every estimate
(the loader still computes the full 1024-tone allocation), so every estimate makes a map.
"""

from __future__ import annotations

import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))

GOALS = {
    "publish_p99_ms": "<= 2 ms (estimate in -> map adopted by a loopback follower, 1024 tones)",
    "publish_p50_ms": "(median of the same)",
}


class _ReloadEveryTime:
    """Change control that turns every tracked view into a reload."""

    def __init__(self, loader) -> None:
        self.loader = loader
        self.current = None

    def decide(self, tracked, now_s):
        from brimline.daemon.records import Decision, DecisionKind

        alloc = self.loader(10.0 ** (np.asarray(tracked.effective_snr_db) / 10.0))
        self.current = alloc
        return Decision(DecisionKind.RELOAD, "benchmark reload", alloc, int(alloc.bits.size))

    def force(self, allocation, kind, reason, now_s):
        self.current = allocation


def run(quick: bool) -> dict[str, float]:
    from _service_fakes import ScriptedDriver, loopback_config

    from brimline.daemon.follower import Follower
    from brimline.daemon.service import Service
    from brimline.drivers.ofdm import make_plan

    n = 300 if quick else 2000
    with tempfile.TemporaryDirectory() as tmp:
        cfg = loopback_config(Path(tmp), link={"fft_size": 2048, "used_tones_half": 586})
        plan = make_plan(**cfg.link.model_dump())
        assert plan.data_tones.size == 1024
        # The frames come from the benchmark, not the driver thread: an idle source.
        idle = ScriptedDriver(plan, frames=0)
        estimates = list(ScriptedDriver(plan, frames=n + 20, frame_s=0.01).frames())
        t_enter: dict[int, float] = {}
        t_adopt: dict[int, float] = {}
        got = threading.Condition()
        stop = threading.Event()
        with Service(cfg, driver=idle) as svc:
            svc.change = _ReloadEveryTime(svc.loader)
            eps = svc.endpoints
            ready = threading.Event()

            def follow():
                def on_map(m):
                    with got:
                        t_adopt[m.seq] = time.perf_counter()
                        got.notify()

                with Follower(plan=plan, map_endpoint=eps["maps"],
                              snapshot_endpoint=eps["snapshots"], ack_endpoint=None,
                              bits=list(cfg.loading.bits), on_map=on_map) as f:
                    while not stop.is_set():
                        f.poll(0.001)
                        if f.last_heartbeat is not None and f.synced:
                            ready.set()

            th = threading.Thread(target=follow)
            th.start()
            deadline = time.monotonic() + 10
            while not ready.is_set() and time.monotonic() < deadline:
                svc.step(0.01)
            for est in estimates:
                t0 = time.perf_counter()
                m = svc.process(est)
                if m is None:
                    continue
                t_enter[m.seq] = t0
                with got:
                    got.wait_for(lambda: m.seq in t_adopt, timeout=1.0)
                svc.step(0.0)  # heartbeats and status, as the loop would
            stop.set()
            th.join(5)
    lat = np.array([t_adopt[s] - t_enter[s] for s in t_enter if s in t_adopt])[10:] * 1e3
    return {"publish_p99_ms": float(np.percentile(lat, 99)),
            "publish_p50_ms": float(np.percentile(lat, 50))}


if __name__ == "__main__":
    print(run(quick="--quick" in sys.argv))
