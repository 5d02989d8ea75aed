"""Shared helpers of the protocol tests: a tone plan, maps, random-port publishers, deadlines.

Sockets bind to 127.0.0.1 on free ports with LINGER 0; waits are polls with deadlines.
"""

from __future__ import annotations

import time

import numpy as np

from brimline.daemon.records import LoadMap, TonePlan

ANY_PORT = "tcp://127.0.0.1:0"


def wifi_like_plan() -> TonePlan:
    """IEEE 802.11a-1999 clause 17 numerology: 48 data tones, pilots at -21, -7, 7, 21."""
    data = [t for t in range(-26, 27) if t not in (0, -21, -7, 7, 21)]
    return TonePlan(64, 16, 20e6, data, [-21, -7, 7, 21])


def make_map(seq: int, *, plan: TonePlan | None = None, epoch: str = "e1", bits: int = 2,
             power: float = 0.9, **kw) -> LoadMap:
    """A valid map: every tone ``bits`` bits at ``power`` (total under a 0 dB budget)."""
    plan = plan or wifi_like_plan()
    n = plan.data_tones.size
    b = np.full(n, bits)
    p = np.where(b > 0, power, 0.0)
    fields = dict(epoch=epoch, seq=seq, effective_frame=10 * seq, created_s=float(seq),
                  plan_id=plan.plan_id, tone_index=plan.data_tones, bits=b, power_lin=p,
                  total_bits=int(b.sum()), margin_db=3.0, gap_db=9.8, reason="test")
    fields.update(kw)
    return LoadMap(**fields)


def until(condition, timeout_s: float = 10.0, *, step=None) -> bool:
    """Call ``step()`` (if given) then ``condition()`` until it is true or the deadline passes.

    The default deadline is generous on purpose: it only catches a hang, so a busy machine that
    takes a while never fails a test. Timing figures live in ``tests/bench/run.py``.
    """
    deadline = time.monotonic() + timeout_s
    while True:
        if step is not None:
            step()
        if condition():
            return True
        if time.monotonic() > deadline:
            return False
        if step is None:
            time.sleep(0.002)


class FakeClock:
    """A settable monotonic clock for staleness tests."""

    def __init__(self, t: float = 100.0) -> None:
        self.t = t

    def __call__(self) -> float:
        return self.t
