"""The browser view (``brimline lookout``): how fast pages follow, and what viewers cost the daemon.

``view_update_ms_*``: a status message is published on a status PUB (the daemon's
:class:`StatusPublisher`; real status messages of a 1024-tone map, built by ``build_status``
and grouped into 128 columns as the daemon does) at 20 per second; ``brimline lookout`` runs in
its own process, subscribed to it; 10 pages, played by aiohttp WebSocket clients in a third
process, are connected to the view. The clock starts just before the publish call and stops
when a page's client has the update in hand (before parsing it), for every (message, page)
pair; p99 and median over all pairs. All processes read CLOCK_MONOTONIC (one clock per machine
on Linux). ``view_updates_lost`` counts pairs that never arrived.

``publish_p99_ms_*``: the publish latency of ``bench_publish`` (estimate into the daemon ->
map adopted by a follower in another process, 1024 tones, daemon and follower pinned to
different cores when there are two), with the status stream at 20 per second and either no
viewer or the view process with its 10 pages subscribed. The two conditions alternate in
blocks within one daemon (none, viewers, none, viewers), and the p99 of each condition is taken
over its blocks; ``publish_p99_viewers_ratio`` is viewers / none. The view and the pages are
not pinned: on a two-core box they take CPU time from the daemon's and the follower's cores,
which is what running them beside the daemon costs.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
from bench_publish import FOLLOWER_SCRIPT, LINK
from reference import Reference

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))

PAGES = 10
_ALL_CPUS = os.sched_getaffinity(0) if hasattr(os, "sched_getaffinity") else None
STATUS_RATE_HZ = 20.0

GOALS = {
    "view_update_ms_p99": f"<= 100 ms (status published -> update at each of {PAGES} "
                          "WebSocket pages of brimline lookout)",
    "view_update_ms_p50": "(median of the same)",
    "view_update_p99_vs_ref": "view_update_ms_p99 in reference times",
    "view_updates_lost": "0 (updates a page never received)",
    "publish_p99_ms_no_viewers": "(publish_p99_ms with no viewer, 20 status messages/s)",
    "publish_p99_ms_10_viewers": f"(publish_p99_ms with the view and {PAGES} pages attached)",
    "publish_p99_viewers_ratio": "<= 1.10 (10 viewers / none)",
    "publish_p99_no_viewers_vs_ref": "publish_p99_ms_no_viewers in reference times",
    "publish_p99_10_viewers_vs_ref": "publish_p99_ms_10_viewers in reference times",
}

# Pages: connect, print "ready" once every page has its snapshot, then record the arrival of
# every update by status_seq until told to stop on standard input; print them as JSON.
_PAGES_SCRIPT = r"""
import asyncio, json, sys, time
import aiohttp
url, n = sys.argv[1], int(sys.argv[2])
arrived = [dict() for _ in range(n)]
async def page(i, http, ready):
    async with http.ws_connect(url + "stream", max_msg_size=0) as ws:
        await ws.receive()  # the snapshot
        ready.add(i)
        async for msg in ws:
            t = time.monotonic()
            data = json.loads(msg.data)
            if data.get("kind") == "update":
                arrived[i][data["frame"]["status_seq"]] = t
async def main():
    ready = set()
    async with aiohttp.ClientSession() as http:
        tasks = [asyncio.ensure_future(page(i, http, ready)) for i in range(n)]
        while len(ready) < n:
            await asyncio.sleep(0.01)
        print("ready", flush=True)
        await asyncio.get_running_loop().run_in_executor(None, sys.stdin.readline)
        for task in tasks:
            task.cancel()
        await asyncio.gather(*tasks, return_exceptions=True)
    print(json.dumps(arrived), flush=True)
asyncio.run(main())
"""


class Viewers:
    """``brimline lookout`` on a status endpoint and ``PAGES`` WebSocket pages connected to it."""

    def __init__(self, endpoint: str) -> None:
        self.endpoint = endpoint
        self.view = self.pages = None

    def __enter__(self) -> "Viewers":
        # Children inherit the calling thread's CPU affinity: the viewers are not pinned to
        # the daemon's core, they float over all of them.
        pinned = os.sched_getaffinity(0) if hasattr(os, "sched_getaffinity") else None
        if pinned is not None:
            os.sched_setaffinity(0, _ALL_CPUS)
        try:
            self.view = subprocess.Popen(
                [sys.executable, "-m", "brimline.daemon", "lookout", "--endpoint",
                 self.endpoint, "--port", "0"], stdout=subprocess.PIPE, text=True)
            line = self.view.stdout.readline()
            url = line.split(" open ", 1)[1].split()[0]
            self.pages = subprocess.Popen([sys.executable, "-c", _PAGES_SCRIPT, url, str(PAGES)],
                                          stdin=subprocess.PIPE, stdout=subprocess.PIPE,
                                          text=True)
        finally:
            if pinned is not None:
                os.sched_setaffinity(0, pinned)
        assert self.pages.stdout.readline().strip() == "ready"
        return self

    def arrivals(self) -> list[dict[int, float]]:
        """Stop the pages; each page's ``{status_seq: arrival time}``."""
        out, _ = self.pages.communicate("stop\n", timeout=60)
        return [{int(k): v for k, v in page.items()}
                for page in json.loads(out.strip().splitlines()[-1])]

    def __exit__(self, *exc) -> None:
        if self.pages is not None and self.pages.poll() is None:
            self.pages.kill()
            self.pages.wait(10)
        if self.view is not None:
            self.view.send_signal(signal.SIGINT)
            try:
                self.view.wait(10)
            except subprocess.TimeoutExpired:
                self.view.kill()
                self.view.wait(10)


def _status_message(plan, t: float) -> dict:
    from protocol_helpers import make_map

    from brimline.daemon.runtime.status import build_status

    rng = np.random.default_rng(int(t * 1000))
    snr = 25.0 + rng.standard_normal(plan.data_tones.size)
    m = make_map(1, plan=plan, bits=6, power=0.9)
    return build_status(time_s=t, epoch="bench", driver={"name": "sim", "state": "running"},
                        frames={"received": int(t * 50), "accepted": int(t * 50)},
                        estimate_age_s=0.01, tone_index=plan.data_tones, snr_db=snr,
                        current_map=m, current_kind="reload", symbol_rate_hz=13333.0)


def _view_updates(n: int, ref: Reference) -> dict[str, float]:
    import zmq

    from brimline.daemon.net.publisher import StatusPublisher
    from brimline.drivers.link.frame import make_plan

    plan = make_plan(**LINK)
    messages = [_status_message(plan, 0.05 * i) for i in range(20)]
    published: dict[int, float] = {}
    ctx = zmq.Context()
    try:
        with StatusPublisher(endpoint="tcp://127.0.0.1:0", context=ctx, hwm=100) as pub, \
                Viewers(pub.endpoint) as viewers:
            seq = 0
            # PUB/SUB joins late: the first tenth is not measured (nor anything before the
            # first status the view passed on)
            warm = n // 10
            while seq < warm + n:
                if seq % 10 == 0:
                    ref.sample()  # before the timed publish, not during a delivery
                t0 = time.monotonic()
                pub.publish(messages[seq % len(messages)])
                published[seq] = t0
                seq += 1
                time.sleep(1.0 / STATUS_RATE_HZ)
            time.sleep(0.5)
            arrivals = viewers.arrivals()
    finally:
        ctx.destroy(linger=0)
    first = min(min(page) for page in arrivals if page)  # the first status the view got
    measured = [s for s in published if s >= max(first, warm)]
    lat, lost = [], 0
    for page in arrivals:
        for s in measured:
            if s in page:
                lat.append((page[s] - published[s]) * 1e3)
            else:
                lost += 1
    lat = np.array(lat)
    return {"view_update_ms_p99": float(np.percentile(lat, 99)),
            "view_update_ms_p50": float(np.percentile(lat, 50)),
            "view_updates_lost": float(lost)}


def _publish_with_and_without(n: int, ref: Reference) -> dict[str, float]:
    """publish_p99_ms with no viewer and with the view and its pages, alternating blocks."""
    from _service_fakes import ReloadEveryTime, ScriptedDriver, loopback_config

    from brimline.daemon.runtime.service import Service
    from brimline.drivers.link.frame import make_plan

    blocks = ["none", "viewers", "none", "viewers"]
    per_block = n // len(blocks)
    lat: dict[str, list[float]] = {"none": [], "viewers": []}
    with tempfile.TemporaryDirectory() as tmp:
        cfg = loopback_config(Path(tmp), link=LINK, status={"rate_hz": STATUS_RATE_HZ})
        plan = make_plan(**cfg.link.model_dump())
        estimates = list(ScriptedDriver(plan, frames=n + 40, frame_s=0.01).frames())
        with Service(cfg, driver=ScriptedDriver(plan, frames=0)) as svc:
            svc.controller.change = ReloadEveryTime(svc.loader)
            eps = svc.endpoints
            follower = subprocess.Popen(
                [sys.executable, "-c", FOLLOWER_SCRIPT, eps["maps"], eps["snapshots"],
                 json.dumps(LINK)], stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True)
            t_enter: dict[int, tuple[str, float]] = {}
            try:
                deadline = time.monotonic() + 20
                while time.monotonic() < deadline:
                    svc.step(0.01)
                    if _readable(follower.stdout):
                        assert follower.stdout.readline().strip() == "ready"
                        break
                feed = iter(estimates)
                for _ in range(20):  # warm-up maps, not counted
                    svc.process(next(feed))
                    svc.step(0.003)
                for block in blocks:
                    with (Viewers(eps["status"]) if block == "viewers" else _Nothing()):
                        for i in range(per_block):
                            if i % 10 == 0:
                                ref.sample()
                            t0 = time.monotonic()
                            m = svc.process(next(feed))
                            if m is not None:
                                t_enter[m.seq] = (block, t0)
                            svc.step(0.003)
                        time.sleep(0.2)
                out, _ = follower.communicate("stop\n", timeout=20)
            finally:
                if follower.poll() is None:
                    follower.kill()
                    follower.wait(5)
    adopted = {int(k): v for k, v in json.loads(out.strip().splitlines()[-1]).items()}
    for seq, (block, t0) in t_enter.items():
        if seq in adopted:
            lat[block].append((adopted[seq] - t0) * 1e3)
    none = float(np.percentile(lat["none"], 99))
    viewers = float(np.percentile(lat["viewers"], 99))
    return {"publish_p99_ms_no_viewers": none, "publish_p99_ms_10_viewers": viewers,
            "publish_p99_viewers_ratio": viewers / none}


class _Nothing:
    def __enter__(self):
        return self

    def __exit__(self, *exc):
        return None


def _readable(stream) -> bool:
    import select

    return bool(select.select([stream], [], [], 0)[0])


def run(quick: bool) -> dict[str, float]:
    ref = Reference()
    out = _view_updates(100 if quick else 600, ref)
    ref_ms = ref.seconds() * 1e3
    out["view_update_p99_vs_ref"] = out["view_update_ms_p99"] / ref_ms
    cpus = os.sched_getaffinity(0) if hasattr(os, "sched_getaffinity") else None
    if cpus is not None and len(cpus) > 1:
        os.sched_setaffinity(0, {min(cpus)})  # the daemon on one core, as bench_publish
    ref = Reference()
    try:
        out.update(_publish_with_and_without(400 if quick else 2000, ref))
    finally:
        if cpus is not None and len(cpus) > 1:
            os.sched_setaffinity(0, cpus)
    ref_ms = ref.seconds() * 1e3
    out["publish_p99_no_viewers_vs_ref"] = out["publish_p99_ms_no_viewers"] / ref_ms
    out["publish_p99_10_viewers_vs_ref"] = out["publish_p99_ms_10_viewers"] / ref_ms
    return out


if __name__ == "__main__":
    print(run(quick="--quick" in sys.argv))
