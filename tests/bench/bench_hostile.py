"""soak_*: the daemon under a mix of hostile clients, with a good follower that must get every map.

The daemon (a :class:`Service` on the simulator, paced in real time, with its own simulated
transmitter following over loopback and a slow gain drift so that maps keep changing) runs its
loop in this process for 60 s (10 s with ``--quick``). Two other processes connect to it:

* a **good follower** (a :class:`Follower`, acknowledging what it adopts) that records every
  map it adopts and every heartbeat's own time stamp (``time_s``, the daemon's
  CLOCK_MONOTONIC at sending) and arrival time;
* a **hostile client** that, as fast as one core allows, sends the malformed and forged
  acknowledgements of ``tests/test_hostile.py`` (``BAD_ACKS``), bad snapshot requests, raw TCP
  junk on every port, a 1 MiB frame on a fresh socket now and then (refused by the frame
  ceiling), and opens and closes sockets (connection churn).

Figures:

``soak_heartbeat_late_ms_p99`` / ``_max``
    How late each heartbeat was sent against its schedule: the gap between consecutive
    heartbeats, stamped in the daemon as they are handed to the socket, minus
    ``publish.heartbeat_s`` (0.1 s here), in ms.
``soak_calm_heartbeat_late_ms_p99``
    The same without the hostile client (a third of the duration), measured just before: the
    reference that shows what the machine itself allows.
``soak_heartbeat_arrival_ms_p99``
    Heartbeat stamp to arrival at the good follower, ms.
``soak_rss_growth_mb``
    Resident memory of the daemon process at the end minus after warm-up, MB.
``soak_maps_lost``
    Maps the good follower did not adopt between its first and the daemon's last (each map is
    one seq), plus one if it did not end on the daemon's current map.
``soak_hostile_msgs`` / ``soak_rejected``
    Hostile messages sent, and messages the daemon dropped and counted (``protocol_errors``).
"""

from __future__ import annotations

import json
import select
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))

GOALS = {
    "soak_heartbeat_late_ms_p99": "<= 10 ms (heartbeat sent vs schedule, hostile clients on)",
    "soak_heartbeat_late_ms_max": "(worst heartbeat of the soak)",
    "soak_calm_heartbeat_late_ms_p99": "(reference: same daemon, no hostile client)",
    "soak_heartbeat_arrival_ms_p99": "(heartbeat stamp -> good follower, loopback)",
    "soak_rss_growth_mb": "<= 50 MB (daemon resident memory, end minus start)",
    "soak_maps_lost": "0 (maps the good follower missed)",
    "soak_maps": "(maps published during the soak)",
    "soak_hostile_msgs": "(malformed, forged or oversized messages sent)",
    "soak_rejected": "(of those, dropped and counted by the daemon)",
}

_FOLLOWER = r"""
import json, select, sys, time
from brimline.daemon.net.follower import Follower
from brimline.drivers.link.frame import make_plan
eps, link, loading = json.loads(sys.argv[1]), json.loads(sys.argv[2]), json.loads(sys.argv[3])
plan = make_plan(**link)
adopted, beats = [], []
with Follower(plan=plan, map_endpoint=eps["maps"], snapshot_endpoint=eps["snapshots"],
              ack_endpoint=eps["acks"], on_map=lambda m: adopted.append(m.seq),
              **loading) as f:
    ready, last = False, None
    while True:
        m = f.poll(0.002)
        if m is not None:
            f.ack(m.effective_frame, m.created_s)
        hb = f.last_heartbeat
        if hb is not None and hb is not last:
            beats.append((hb["time_s"], time.monotonic()))
            last = hb
        if not ready and f.synced and hb is not None:
            print("ready", flush=True)
            ready = True
        if select.select([sys.stdin], [], [], 0)[0]:
            break
    print(json.dumps({"adopted": adopted, "beats": beats, "gaps": f.counters["gaps"],
                      "current": None if f.current is None else f.current.seq}), flush=True)
"""

_HOSTILE = r"""
import json, os, select, socket, sys
import zmq
sys.path.insert(0, sys.argv[2])
from test_hostile import BAD_ACKS, _ack
eps = json.loads(sys.argv[1])
ctx = zmq.Context()
def sock(kind, ep):
    s = ctx.socket(kind)
    s.setsockopt(zmq.LINGER, 0)
    s.setsockopt(zmq.SNDHWM, 100)
    s.connect(ep)
    return s
push, dealer = sock(zmq.PUSH, eps["acks"]), sock(zmq.DEALER, eps["snapshots"])
frames = [f for f, _ in BAD_ACKS] + [_ack(10**18, epoch=eps["epoch"])]
sent = rounds = 0
while not select.select([sys.stdin], [], [], 0)[0]:
    rounds += 1
    for f in frames:
        try:
            push.send_multipart(f, flags=zmq.NOBLOCK)
            sent += 1
        except zmq.Again:
            pass
    try:
        dealer.send_multipart([b"", b"snapshot", b"more"], flags=zmq.NOBLOCK)
        sent += 1
    except zmq.Again:
        pass
    if rounds % 50 == 0:  # an oversized frame on a fresh socket, and connection churn
        big = sock(zmq.PUSH, eps["acks"])
        big.send_multipart([b"ack", b" " * (1 << 20)])
        sent += 1
        big.close()
        push.close()
        push = sock(zmq.PUSH, eps["acks"])
    if rounds % 100 == 0:  # raw TCP junk on every port
        for key in ("acks", "snapshots", "maps", "status"):
            host, port = eps[key][len("tcp://"):].rsplit(":", 1)
            try:
                with socket.create_connection((host, int(port)), timeout=1) as raw:
                    raw.sendall(os.urandom(1024))
                    sent += 1
            except OSError:
                pass
    select.select([], [], [], 0.001)
push.close(); dealer.close(); ctx.term()
print(json.dumps({"sent": sent}), flush=True)
"""


_IDLE = 'import sys; sys.stdin.readline(); print(\'{"sent": 0}\')'


def _rss_mb() -> float:
    with open("/proc/self/status") as f:
        for line in f:
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) / 1024.0
    return float("nan")


def run(quick: bool) -> dict[str, float]:
    duration_s = 10.0 if quick else 60.0
    calm = _soak(duration_s / 3, hostile_on=False)
    figures = _soak(duration_s)
    figures["soak_calm_heartbeat_late_ms_p99"] = calm["soak_heartbeat_late_ms_p99"]
    return figures


def _soak(duration_s: float, hostile_on: bool = True) -> dict[str, float]:
    from _service_fakes import loopback_config

    from brimline.daemon.runtime.service import Service

    sim = {"profile": "awgn", "doppler_hz": 0.0, "snr_db": 27.0, "realtime": True,
           "frame_rate_hz": 100.0, "drift_db": 6.0, "drift_period_s": 4.0, "seed": 3}
    with tempfile.TemporaryDirectory() as tmp:
        cfg = loopback_config(Path(tmp), driver={"kind": "sim", "sim": sim},
                              change={"up_dwell_s": 0.2})
        loading = {"bits": list(cfg.loading.bits), "budget_db": cfg.loading.budget_db,
                   "cap_db": cfg.loading.cap_db}
        procs = []
        sent_s: list[float] = []
        with Service(cfg) as svc:
            maps_pub = svc._io.maps
            send_heartbeat = maps_pub.heartbeat

            def stamped(now_s):
                send_heartbeat(now_s)
                sent_s.append(time.monotonic())

            maps_pub.heartbeat = stamped  # tick() calls it: stamps every heartbeat sent
            eps = {**svc.endpoints, "epoch": svc.epoch}
            follower = subprocess.Popen(
                [sys.executable, "-c", _FOLLOWER, json.dumps(eps),
                 json.dumps(cfg.link.model_dump()), json.dumps(loading)],
                stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True)
            procs.append(follower)
            try:
                deadline = time.monotonic() + 30
                while time.monotonic() < deadline:
                    svc.step(0.01)
                    if select.select([follower.stdout], [], [], 0)[0]:
                        assert follower.stdout.readline().strip() == "ready"
                        break
                hostile = subprocess.Popen(
                    [sys.executable, "-c", _HOSTILE if hostile_on else _IDLE, json.dumps(eps),
                     str(HERE.parent)],
                    stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True)
                procs.append(hostile)
                warm_end = time.monotonic() + min(2.0, duration_s / 5)
                while time.monotonic() < warm_end:
                    svc.step(0.01)
                rss0 = _rss_mb()
                maps0 = sum(svc.controller.maps_published.values())
                first_beat = len(sent_s)
                end = time.monotonic() + duration_s
                while time.monotonic() < end:
                    svc.step(0.01)
                hostile_out, _ = hostile.communicate("stop\n", timeout=30)
                beats = np.array(sent_s[first_beat:])
                rss1 = _rss_mb()
                svc.driver.close()  # no more maps; the follower catches the last one
                settle = time.monotonic() + 1.5
                while time.monotonic() < settle:
                    svc.step(0.01)
                follower.stdin.write("stop\n")
                follower.stdin.flush()
                while follower.poll() is None:
                    svc.step(0.01)
                follower_out = follower.stdout.read()
                status = svc.status()
                last_seq = svc.current_map.seq if svc.current_map is not None else -1
                maps = sum(svc.controller.maps_published.values()) - maps0
            finally:
                for p in procs:
                    if p.poll() is None:
                        p.kill()
                        p.wait(5)
    fol = json.loads(follower_out.strip().splitlines()[-1])
    sent = json.loads(hostile_out.strip().splitlines()[-1])["sent"]
    stamps = np.array([b[0] for b in fol["beats"]])
    arrivals = np.array([b[1] for b in fol["beats"]])
    late = (np.diff(beats) - cfg.publish.heartbeat_s) * 1e3
    adopted = fol["adopted"]
    missing = set(range(adopted[0], last_seq + 1)) - set(adopted) if adopted else {0}
    lost = len(missing) + (0 if fol["current"] == last_seq else 1)
    rejected = sum(sum(r.values()) for r in status["protocol_errors"].values())
    return {"soak_heartbeat_late_ms_p99": float(np.percentile(late, 99)),
            "soak_heartbeat_late_ms_max": float(late.max()),
            "soak_heartbeat_arrival_ms_p99": float(np.percentile((arrivals - stamps) * 1e3, 99)),
            "soak_rss_growth_mb": float(rss1 - rss0),
            "soak_maps_lost": float(lost),
            "soak_maps": float(maps),
            "soak_hostile_msgs": float(sent),
            "soak_rejected": float(rejected)}


if __name__ == "__main__":
    print(json.dumps(run(quick="--quick" in sys.argv), indent=1))
