"""Protocol figures: codec cost, map delivery over loopback, recording cost.

All sockets on 127.0.0.1, free ports, LINGER 0. The maps are 1024-tone (a large OFDM plan).
"""

from __future__ import annotations

import tempfile
import time
from pathlib import Path

import numpy as np
import zmq

from brimline.daemon.net.follower import Follower
from brimline.daemon.net.publisher import MapPublisher
from brimline.daemon.records import Estimate, LoadMap, TonePlan
from brimline.daemon.wire import codec
from brimline.daemon.wire.recording import RecordReader, RecordWriter

GOALS = {
    "codec_encode_us": "encode a 1024-tone LoadMap, microseconds (goal < 100)",
    "codec_decode_us": "decode and check a 1024-tone LoadMap, microseconds (goal < 200)",
    "codec_vs_json_lists": "encode+decode time over a naive JSON-lists encoding (goal < 0.5)",
    "map_delivery_p50_ms": "publish -> follower adopted, loopback, median ms (goal < 1)",
    "map_delivery_p99_ms": "publish -> follower adopted, loopback, 99th percentile ms (goal < 5)",
    "late_join_ms": "a follower started late holds the current map (snapshot), ms (goal < 1000)",
    "record_write_us": "append one 1024-tone estimate to a recording, microseconds (goal < 200)",
    "record_read_us": "read and decode one recorded estimate, microseconds (goal < 200)",
}

_N = 1024


def _plan() -> TonePlan:
    tones = np.r_[np.arange(-_N // 2 - 8, -8), np.arange(9, _N // 2 + 9)][:_N]
    return TonePlan(4096, 288, 61.44e6, tones, [-4, 4])


def _map(plan: TonePlan, seq: int, rng) -> LoadMap:
    bits = rng.integers(0, 9, _N)
    power = np.where(bits > 0, rng.uniform(0.5, 0.99, _N), 0.0)
    return LoadMap("bench", seq, seq, float(seq), plan.plan_id, plan.data_tones, bits, power,
                   int(bits.sum()), 3.0, 9.8, reason="bench")


def _per_call_us(fn, n: int) -> float:
    fn()
    t = time.perf_counter()
    for _ in range(n):
        fn()
    return (time.perf_counter() - t) / n * 1e6


def _json_lists(m: LoadMap) -> bytes:
    import json
    return json.dumps({"seq": m.seq, "bits": m.bits.tolist(),
                       "power_lin": m.power_lin.tolist(),
                       "tone_index": m.tone_index.tolist()}).encode()


def run(quick: bool) -> dict[str, float]:
    import json
    rng = np.random.default_rng(7)
    plan = _plan()
    m = _map(plan, 1, rng)
    reps = 300 if quick else 3000
    frames = codec.encode("map", m)
    enc = _per_call_us(lambda: codec.encode("map", m), reps)
    dec = _per_call_us(lambda: codec.decode(frames), reps)
    blob = _json_lists(m)
    naive = _per_call_us(lambda: (_json_lists(m), json.loads(blob)), reps)
    out = {"codec_encode_us": enc, "codec_decode_us": dec,
           "codec_vs_json_lists": (enc + dec) / naive}

    ctx = zmq.Context()
    try:
        with MapPublisher(map_endpoint="tcp://127.0.0.1:0", snapshot_endpoint="tcp://127.0.0.1:0",
                          ack_endpoint=None, linger_s=0, context=ctx) as pub, \
                Follower(plan=plan, map_endpoint=pub.map_endpoint,
                         snapshot_endpoint=pub.snapshot_endpoint, context=ctx) as f:
            pub.publish(m)
            deadline = time.monotonic() + 5
            while not f.synced and time.monotonic() < deadline:
                pub.handle_snapshot()
                f.poll(0.005)
            while f.counters["heartbeats"] == 0 and time.monotonic() < deadline:
                pub.heartbeat(0.0)
                f.poll(0.005)
            maps = [_map(plan, s, rng) for s in range(2, (200 if quick else 2000) + 2)]
            lat = []
            for nxt in maps:
                t = time.perf_counter()
                pub.publish(nxt)
                while f.current.seq != nxt.seq and time.perf_counter() - t < 1.0:
                    f.poll(0.001)
                lat.append(time.perf_counter() - t)
            t = time.perf_counter()
            with Follower(plan=plan, map_endpoint=pub.map_endpoint,
                          snapshot_endpoint=pub.snapshot_endpoint, context=ctx) as late:
                while late.current is None and time.perf_counter() - t < 5.0:
                    pub.handle_snapshot()
                    late.poll(0.001)
                out["late_join_ms"] = (time.perf_counter() - t) * 1e3
        out["map_delivery_p50_ms"] = float(np.percentile(lat, 50) * 1e3)
        out["map_delivery_p99_ms"] = float(np.percentile(lat, 99) * 1e3)
    finally:
        ctx.destroy(linger=0)

    est = Estimate(frame=1, time_s=0.0, plan_id=plan.plan_id, tone_index=plan.data_tones,
                   channel=rng.normal(size=_N) + 1j * rng.normal(size=_N),
                   noise_var=np.full(_N, 0.01), snr_db=rng.uniform(0, 30, _N))
    with tempfile.TemporaryDirectory() as d:
        path = Path(d) / "bench.brl"
        with RecordWriter(path) as w:
            out["record_write_us"] = _per_call_us(lambda: w.write("estimate", est), reps)
        t = time.perf_counter()
        with RecordReader(path) as r:
            count = sum(1 for _ in r)
        out["record_read_us"] = (time.perf_counter() - t) / count * 1e6
    return out
