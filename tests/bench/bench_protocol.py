"""Protocol figures: codec cost, map delivery over loopback, recording cost.

All sockets on 127.0.0.1, free ports, LINGER 0. The maps are 1024-tone (a large OFDM plan).
Every time figure has a ``*_vs_ref`` companion: the time over the reference workload
(``reference.py``), sampled between the blocks of calls it normalizes.
"""

from __future__ import annotations

import tempfile
import time
from pathlib import Path

import numpy as np
import zmq
from reference import Reference

from brimline.daemon.net.follower import Follower
from brimline.daemon.net.publisher import MapPublisher, StatusPublisher
from brimline.daemon.records import Estimate, LoadMap, TonePlan
from brimline.daemon.wire import codec
from brimline.daemon.wire.recording import RecordReader, RecordWriter

GOALS = {
    "codec_encode_us": "encode a 1024-tone LoadMap, microseconds (goal < 100)",
    "codec_decode_us": "decode and check a 1024-tone LoadMap, microseconds (goal < 200)",
    "codec_vs_json_lists": "encode+decode time over a naive JSON-lists encoding (goal < 0.5)",
    "map_delivery_p50_ms": "publish -> follower adopted, loopback, median ms (goal < 1)",
    "map_delivery_p99_ms": "publish -> follower adopted, loopback, 99th percentile ms (goal < 5)",
    "record_write_us": "append one 1024-tone estimate to a recording, microseconds (goal < 200)",
    "record_read_us": "read and decode one recorded estimate, microseconds (goal < 200)",
    "codec_encode_vs_ref": "codec_encode_us in reference times",
    "codec_decode_vs_ref": "codec_decode_us in reference times",
    "map_delivery_p50_vs_ref": "map_delivery_p50_ms in reference times",
    "map_delivery_p99_vs_ref": "map_delivery_p99_ms in reference times",
    "record_write_vs_ref": "record_write_us in reference times",
    "record_read_vs_ref": "record_read_us in reference times",
    "late_join_ms": "new follower -> current map adopted from the snapshot, median ms "
                    "(goal < 1000)",
    "late_join_vs_ref": "late_join_ms in reference times",
    "stuck_status_map_p99_ms": "map delivery beside a status subscriber that never reads, "
                               "p99 ms (goal < 500)",
    "stuck_status_map_p99_vs_ref": "stuck_status_map_p99_ms in reference times",
    "stuck_status_send_max_ms": "longest status publish (20 kB) with that subscriber, ms "
                                "(goal < 250: never blocks)",
    "stuck_status_send_max_vs_ref": "stuck_status_send_max_ms in reference times",
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


def _per_call_us(fn, n: int, ref: Reference | None = None, blocks: int = 10) -> float:
    """Mean time of ``n`` calls in microseconds; with ``ref``, the calls run in ``blocks``
    blocks with a reference sample before each (outside the timed blocks)."""
    fn()
    if ref is None:
        blocks = 1
    sizes = [len(part) for part in np.array_split(np.arange(n), blocks)]
    total = 0.0
    for size in sizes:
        if ref is not None:
            ref.sample()
        t = time.perf_counter()
        for _ in range(size):
            fn()
        total += time.perf_counter() - t
    return total / n * 1e6


def _wait(condition, step, timeout_s: float = 10.0) -> bool:
    deadline = time.monotonic() + timeout_s
    while not condition():
        if time.monotonic() > deadline:
            return False
        step()
    return True


def _late_join(ctx, plan: TonePlan, rng, ref: Reference, joins: int) -> dict[str, float]:
    """Time from building a follower to its adopting the current map (snapshot hand-over)."""
    times = []
    mark = ref.mark()
    with MapPublisher(map_endpoint="tcp://127.0.0.1:0", snapshot_endpoint="tcp://127.0.0.1:0",
                      ack_endpoint=None, linger_s=0, context=ctx) as pub:
        for seq in range(1, 4):
            pub.publish(_map(plan, seq, rng))
        for _ in range(joins):
            ref.sample()
            t = time.perf_counter()
            with Follower(plan=plan, map_endpoint=pub.map_endpoint,
                          snapshot_endpoint=pub.snapshot_endpoint, context=ctx) as f:
                if not _wait(lambda: f.current is not None,
                             lambda: (pub.handle_snapshot(), f.poll(0.001))):
                    raise RuntimeError("late joiner got no map within 10 s")
                times.append(time.perf_counter() - t)
    median = float(np.median(times))
    return {"late_join_ms": median * 1e3, "late_join_vs_ref": ref.time_ratio(median, mark)}


def _stuck_status(ctx, plan: TonePlan, rng, ref: Reference, maps: int) -> dict[str, float]:
    """Map delivery and status publish time beside a status subscriber that never reads (the
    status queue full: high-water mark 10, 20 kB messages)."""
    mark = ref.mark()
    with StatusPublisher(endpoint="tcp://127.0.0.1:0", hwm=10, context=ctx) as sp, \
            MapPublisher(map_endpoint="tcp://127.0.0.1:0", snapshot_endpoint="tcp://127.0.0.1:0",
                         ack_endpoint=None, linger_s=0, context=ctx) as pub:
        stuck = ctx.socket(zmq.SUB)
        stuck.setsockopt(zmq.LINGER, 0)
        stuck.setsockopt(zmq.RCVHWM, 10)
        stuck.setsockopt(zmq.RCVBUF, 65536)
        stuck.setsockopt(zmq.SUBSCRIBE, b"")
        stuck.connect(sp.endpoint)
        try:
            pub.publish(_map(plan, 1, rng))
            with Follower(plan=plan, map_endpoint=pub.map_endpoint,
                          snapshot_endpoint=pub.snapshot_endpoint, context=ctx) as f:
                if not _wait(lambda: f.current is not None,
                             lambda: (pub.handle_snapshot(), f.poll(0.001))):
                    raise RuntimeError("follower got no map within 10 s")
                for i in range(200):  # fill every queue on the way to the stuck subscriber
                    sp.publish({"spectrum": np.full(2500, float(i))})
                lat, worst = [], 0.0
                for seq in range(2, maps + 2):
                    ref.sample()
                    for i in range(100):
                        blob = np.full(2500, float(i))
                        t = time.perf_counter()
                        sp.publish({"spectrum": blob})
                        worst = max(worst, time.perf_counter() - t)
                    m = _map(plan, seq, rng)
                    t = time.perf_counter()
                    pub.publish(m)
                    if not _wait(lambda: f.current.seq == seq, lambda: f.poll(0.001)):
                        raise RuntimeError(f"map seq={seq} not adopted within 10 s")
                    lat.append(time.perf_counter() - t)
        finally:
            stuck.close()
    p99 = float(np.percentile(lat, 99))
    return {"stuck_status_map_p99_ms": p99 * 1e3,
            "stuck_status_map_p99_vs_ref": ref.time_ratio(p99, mark),
            "stuck_status_send_max_ms": worst * 1e3,
            "stuck_status_send_max_vs_ref": ref.time_ratio(worst, mark)}


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
    ref = Reference()
    mark = ref.mark()
    enc = _per_call_us(lambda: codec.encode("map", m), reps, ref)
    out = {"codec_encode_us": enc, "codec_encode_vs_ref": ref.time_ratio(enc * 1e-6, mark)}
    mark = ref.mark()
    dec = _per_call_us(lambda: codec.decode(frames), reps, ref)
    out.update(codec_decode_us=dec, codec_decode_vs_ref=ref.time_ratio(dec * 1e-6, mark))
    blob = _json_lists(m)
    naive = _per_call_us(lambda: (_json_lists(m), json.loads(blob)), reps)
    out["codec_vs_json_lists"] = (enc + dec) / naive

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
            mark = ref.mark()
            for i, nxt in enumerate(maps):
                if i % 10 == 0:
                    ref.sample()
                t = time.perf_counter()
                pub.publish(nxt)
                while f.current.seq != nxt.seq and time.perf_counter() - t < 1.0:
                    f.poll(0.001)
                lat.append(time.perf_counter() - t)
        out["map_delivery_p50_ms"] = float(np.percentile(lat, 50) * 1e3)
        out["map_delivery_p99_ms"] = float(np.percentile(lat, 99) * 1e3)
        for q in (50, 99):
            out[f"map_delivery_p{q}_vs_ref"] = ref.time_ratio(float(np.percentile(lat, q)), mark)
        out.update(_late_join(ctx, plan, rng, ref, 10 if quick else 50))
        out.update(_stuck_status(ctx, plan, rng, ref, 50 if quick else 200))
    finally:
        ctx.destroy(linger=0)

    est = Estimate(frame=1, time_s=0.0, plan_id=plan.plan_id, tone_index=plan.data_tones,
                   channel=rng.normal(size=_N) + 1j * rng.normal(size=_N),
                   noise_var=np.full(_N, 0.01), snr_db=rng.uniform(0, 30, _N))
    with tempfile.TemporaryDirectory() as d:
        path = Path(d) / "bench.brl"
        with RecordWriter(path) as w:
            mark = ref.mark()
            write = _per_call_us(lambda: w.write("estimate", est), reps, ref)
            out["record_write_us"] = write
            out["record_write_vs_ref"] = ref.time_ratio(write * 1e-6, mark)
        mark = ref.mark()
        ref.sample(3)
        t = time.perf_counter()
        with RecordReader(path) as r:
            count = sum(1 for _ in r)
        read_s = (time.perf_counter() - t) / count
        ref.sample(3)
        out["record_read_us"] = read_s * 1e6
        out["record_read_vs_ref"] = ref.time_ratio(read_s, mark)
    return out
