"""Receiver speed of a git revision against the working tree, alternating in one process.

Separate benchmark runs on a shared machine differ by 10 % or more, so a speed change of the
receiver is judged here: the revision's ``drivers/link`` modules are copied into a temporary
package, both receivers get the workloads of ``bench_rx.py``, and the bare FFT, the revision's
receiver and the working tree's are called in turn ``repeats`` times: one frame per call
(``Receiver.receive``) and a stream in radio-sized buffers (``FrameScanner.feed``, each
against the batched FFT of the same symbols). It prints the medians, each receiver's ratio to
the FFT and the ratio of the two receivers, and first checks that both give the same
estimates and decisions bit for bit, one frame and streamed (``tests/test_receiver_digest.py``
is the wider check). Not a timed test: run it by hand.

``--fft-size 128`` runs the same on the small plan of the simulator tests (128-point FFT,
64 used tones, 4 data symbols), where the fixed cost of the numpy calls is most of a frame.

Usage::

    python tests/bench/compare_rx.py [REV] [--repeats N] [--rounds K] [--fft-size {1024,128}]
"""

from __future__ import annotations

import argparse
import importlib
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
from bench_rx import BUFFER_FRAMES, PLAN, stream_workload, warm_allocator

from brimline.drivers.air.channel import LinkChannel
from brimline.drivers.link.frame import Transmitter, make_plan
from brimline.drivers.link.receiver import Receiver

ROOT = Path(__file__).resolve().parents[2]
PACKAGE = "_rev_link"
#: Plans by FFT size: the benchmark's, and the small plan of the simulator tests.
PLANS = {1024: PLAN, 128: dict(fft_size=128, cp_len=16, sample_rate_hz=1.92e6,
                               used_tones_half=40, pilot_spacing=8, data_symbols=4)}


def load_revision(rev: str, folder: Path):
    """Import ``rev``'s ``drivers/link`` as the package ``_rev_link``; returns its modules
    ``(frame, receiver)``."""
    names = subprocess.run(["git", "ls-tree", "--name-only", f"{rev}:drivers/link"], cwd=ROOT,
                           check=True, capture_output=True, text=True).stdout.split()
    target = folder / PACKAGE
    target.mkdir()
    for name in names:
        if name.endswith(".py"):
            text = subprocess.run(["git", "show", f"{rev}:drivers/link/{name}"], cwd=ROOT,
                                  check=True, capture_output=True, text=True).stdout
            (target / name).write_text(text.replace("brimline.drivers.link", PACKAGE))
    sys.path.insert(0, str(folder))
    return (importlib.import_module(f"{PACKAGE}.frame"),
            importlib.import_module(f"{PACKAGE}.receiver"))


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("rev", nargs="?", default="main", help="git revision (default: main)")
    parser.add_argument("--repeats", type=int, default=300, help="calls of each per round")
    parser.add_argument("--rounds", type=int, default=3, help="rounds, each printed")
    parser.add_argument("--fft-size", type=int, default=1024, choices=sorted(PLANS),
                        help="plan: the benchmark's (1024) or the simulator tests' (128)")
    args = parser.parse_args(argv)
    warm_allocator()
    with tempfile.TemporaryDirectory() as tmp:
        rev_frame, rev_receiver = load_revision(args.rev, Path(tmp))
        rng = np.random.default_rng(20261201)
        plan_keys = PLANS[args.fft_size]
        plan = make_plan(**plan_keys)
        new = Receiver(plan)
        old = rev_receiver.Receiver(rev_frame.make_plan(**plan_keys))  # the revision's own plan type
        bits = np.full(plan.data_tones.size, 4)
        lookup = {1: (bits, np.ones(bits.size))}.get
        channel = LinkChannel(plan, profile="awgn", snr_db=20.0, cfo_hz=4.1e3,
                              lead_max_samples=plan.cp_len * 4, rng=rng)
        sent = Transmitter(plan).frame(bits=bits, power_lin=np.ones(bits.size), map_seq=1,
                                       counter=0, rng=rng)
        block = channel.transmit(sent.samples, 0.0, tail_samples=plan.cp_len)
        a, b = old.receive(block, lookup), new.receive(block, lookup)
        sent = [Transmitter(plan).frame(bits=bits, power_lin=np.ones(bits.size), map_seq=1,
                                        counter=i, rng=rng) for i in range(16)]
        stream = channel.transmit(np.concatenate([s.samples for s in sent]), 0.0,
                                  tail_samples=plan.cp_len)
        buffer_len = BUFFER_FRAMES * plan.frame_len
        scan_new, fft_frames, _ = stream_workload(new, stream, buffer_len, lookup)
        scan_old = _scan(rev_receiver, old, stream, buffer_len, lookup)
        pairs = [(a, b)] + [(p[1], q[1]) for p_feed, q_feed in zip(scan_old(), scan_new())
                            for p, q in zip(p_feed, q_feed)]
        same = all(_same(p, q) for p, q in pairs) and len(pairs) == 17
        print(f"outputs bit for bit equal (one frame, 16 streamed): {same}")
        symbols = np.ascontiguousarray(
            block[:plan.n_symbols * plan.symbol_len].reshape(plan.n_symbols, plan.symbol_len)
            [:, plan.cp_len:])
        calls = {"fft": lambda: np.fft.fft(symbols, axis=1),
                 "rev": lambda: old.receive(block, lookup, demodulate=False),
                 "tree": lambda: new.receive(block, lookup, demodulate=False),
                 "fft_s": fft_frames, "rev_s": scan_old, "tree_s": scan_new}
        for _ in range(args.rounds):
            times: dict[str, list[float]] = {key: [] for key in calls}
            for i in range(args.repeats):
                for key, call in calls.items():
                    if key.endswith("_s") and i % 16:
                        continue  # a stream pass is 16 frames: fewer of them
                    t0 = time.perf_counter()
                    call()
                    times[key].append(time.perf_counter() - t0)
            med = {key: statistics.median(t) for key, t in times.items()}
            for tag, size, suffix in (("one frame", block.size, ""),
                                      ("stream", stream.size, "_s")):
                fft, rev, tree = (med["fft" + suffix], med["rev" + suffix],
                                  med["tree" + suffix])
                print(f"{tag}: medians us: fft {fft * 1e6:.0f}  {args.rev} {rev * 1e6:.0f}  "
                      f"tree {tree * 1e6:.0f} | rx_vs_fft {args.rev} {rev / fft:.2f} tree "
                      f"{tree / fft:.2f} | rx_msps {args.rev} {size / rev / 1e6:.1f} "
                      f"tree {size / tree / 1e6:.1f} | tree/{args.rev} {tree / rev:.3f}")
            sys.stdout.flush()
    return 0


def _same(a, b) -> bool:
    """Whether two RxFrames carry the same estimates and decisions, bit for bit."""
    arrays = all(np.array_equal(getattr(a, k), getattr(b, k)) and
                 getattr(a, k).dtype == getattr(b, k).dtype
                 for k in ("channel", "noise_var", "snr_db"))
    decided = (a.decided is None) == (b.decided is None) and (
        a.decided is None or all(np.array_equal(p, q) for p, q in zip(a.decided, b.decided)))
    return arrays and decided and (a.reason, a.start, a.end, a.counter) == (
        b.reason, b.start, b.end, b.counter)


def _scan(module, receiver, stream: np.ndarray, buffer_len: int, lookup):
    """``scan()``: ``stream`` through the revision's own FrameScanner in buffers."""
    pieces = [stream[i:i + buffer_len] for i in range(0, stream.size, buffer_len)]

    def scan():
        scanner = module.FrameScanner(receiver)
        return [scanner.feed(piece, lookup, final=i == len(pieces) - 1)
                for i, piece in enumerate(pieces)]
    return scan


if __name__ == "__main__":
    raise SystemExit(main())
