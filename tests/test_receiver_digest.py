"""Bit-exact pin of the receiver's outputs on a fixed, seeded set of streams.

The receiver's accuracy is checked against outside references in ``test_ofdm.py`` (exact
Gray-QAM error rates, the Cramer-Rao bound, Schmidl and Cox). This file guards something else:
that a change meant only to make the receiver faster leaves every output unchanged, bit for bit.
A seeded set of frames covers every branch of the per-frame path (known, default and unknown
maps; a failed header; fading with weak tones; a narrowband interferer; a large frequency
offset; clipping; a stream fed in pieces; blocks without a frame), and a SHA-256 over all
outputs (reasons, timing, header fields, decided symbols, channel, noise and SNR arrays with
their dtypes) must equal the pinned digests.

The digests depend on numpy's floating-point kernels (its SIMD loops, which differ between
AVX2 and AVX-512 machines, and the BLAS it ships), so they are pinned for one numpy minor version
on one kind of machine and skipped elsewhere. A deliberate change of the outputs re-pins them:
run ``python tests/test_receiver_digest.py`` and say why in the commit.
"""

from __future__ import annotations

import hashlib
import platform

import numpy as np
import pytest

from brimline.drivers.air.channel import LinkChannel
from brimline.drivers.link.frame import Transmitter, make_plan
from brimline.drivers.link.receiver import FrameScanner, Receiver

#: numpy version (major.minor) and machine the digests were taken with.
PINNED_NUMPY = "2.4"
PINNED_MACHINE = "x86_64 without AVX-512"

#: Digest of the integer, boolean and text outputs (decisions, timing, header fields).
DECISIONS_SHA256 = "ea8a8da00cee5482c8d95e80226c8924898e686c13c8012673803b94fe0268f8"
#: Digest of every output, floating-point estimates included.
ALL_SHA256 = "a54dbf949ed31c926a13ccfaa9ec9237f043f5ffe83444e8ebdb344e58e1e067"

_BENCH_PLAN = dict(fft_size=1024, cp_len=72, sample_rate_hz=15.36e6, used_tones_half=400,
                   pilot_spacing=8, train_symbols=2, data_symbols=28)


def _frames(plan, tx, channel, rng, bits, power, *, seq, count, tail):
    """``count`` blocks of one frame each through ``channel``; returns (blocks, lookup)."""
    blocks = []
    for i in range(count):
        sent = tx.frame(bits=bits, power_lin=power, map_seq=seq, counter=i, rng=rng)
        blocks.append(channel.transmit(sent.samples, 0.0, tail_samples=tail))
    return blocks, {seq: (bits, power)}.get


def received(seed: int = 20261203) -> list:
    """Every receiver output of the pinned streams, in order: a list of RxFrame (and the
    absolute starts of the scanned stream)."""
    rng = np.random.default_rng(seed)
    out: list = []

    # The benchmark's link: 1024 tones, 16-QAM, AWGN 20 dB, 4.1 kHz offset, random lead.
    plan = make_plan(**_BENCH_PLAN)
    tx, rx = Transmitter(plan), Receiver(plan)
    n = plan.data_tones.size
    bits, power = np.full(n, 4), np.ones(n)
    ch = LinkChannel(plan, profile="awgn", snr_db=20.0, cfo_hz=4.1e3,
                     lead_max_samples=4 * plan.cp_len, rng=rng)
    blocks, lookup = _frames(plan, tx, ch, rng, bits, power, seq=1, count=3, tail=plan.cp_len)
    for block in blocks:
        out.append(rx.receive(block, lookup, demodulate=True))
        out.append(rx.receive(block, lookup, demodulate=False))

    # The default plan on a fading channel with a mixed map: weak tones keep the known-symbol
    # estimate; some tones are off.
    plan = make_plan()
    tx, rx = Transmitter(plan), Receiver(plan)
    n = plan.data_tones.size
    bits = rng.integers(0, 9, n)
    power = rng.uniform(0.5, 2.0, n)
    ch = LinkChannel(plan, profile="eva", doppler_hz=30.0, snr_db=22.0, cfo_hz=1.7e3,
                     lead_max_samples=100, rng=rng)
    blocks, lookup = _frames(plan, tx, ch, rng, bits, power, seq=7, count=4, tail=200)
    out += [rx.receive(block, lookup) for block in blocks]

    # A narrowband interferer between tones, 25 dB above a tone.
    ch = LinkChannel(plan, profile="epa", doppler_hz=5.0, snr_db=25.0, cfo_hz=-900.0,
                     lead_max_samples=60, interferer_tone=23.4, interferer_db=25.0, rng=rng)
    bits, power = np.full(n, 3), np.ones(n)
    blocks, lookup = _frames(plan, tx, ch, rng, bits, power, seq=9, count=3, tail=200)
    out += [rx.receive(block, lookup) for block in blocks]

    # A large offset (integer tones and a fraction), the default map, no lookup.
    ch = LinkChannel(plan, profile="awgn", snr_db=18.0, cfo_hz=3.3 * plan.tone_spacing_hz,
                     lead_max_samples=40, rng=rng)
    blocks, _ = _frames(plan, tx, ch, rng, np.full(n, 2), np.ones(n), seq=-1, count=2,
                        tail=200)
    out += [rx.receive(block) for block in blocks]

    # An unknown map (training and header only), then a failed header (training alone).
    ch = LinkChannel(plan, profile="flat", doppler_hz=2.0, snr_db=20.0, lead_max_samples=40,
                     rng=rng)
    blocks, _ = _frames(plan, tx, ch, rng, np.full(n, 2), np.ones(n), seq=11, count=3,
                        tail=200)
    out.append(rx.receive(blocks[0], lambda seq: None))
    out.append(rx.receive(blocks[1]))
    block = blocks[2].copy()
    start = rx.receive(block).start
    head = start + (1 + plan.train_symbols) * plan.symbol_len
    block[head:head + plan.fft_size] *= -1  # invert the header symbol: its CRC fails
    out.append(rx.receive(block))

    # Clipping, noise only, a truncated frame, a block of zeros.
    level = 0.5 * float(np.abs(blocks[0].real).max())
    clipped = (np.clip(blocks[0].real, -level, level)
               + 1j * np.clip(blocks[0].imag, -level, level))
    out.append(Receiver(plan, clip_level=level).receive(clipped))
    noise = (rng.standard_normal(3 * plan.frame_len)
             + 1j * rng.standard_normal(3 * plan.frame_len)).astype(np.complex64)
    out.append(rx.receive(noise))
    out.append(rx.receive(blocks[1][: plan.frame_len // 2]))
    out.append(rx.receive(np.zeros(20000, np.complex64)))

    # A continuous stream of frames, fed in uneven pieces, with decisions.
    ch = LinkChannel(plan, profile="epa", doppler_hz=10.0, snr_db=24.0, cfo_hz=600.0, rng=rng)
    bits, power = np.full(n, 4), np.ones(n)
    sent = [tx.frame(bits=bits, power_lin=power, map_seq=3, counter=i, rng=rng)
            for i in range(5)]
    stream = ch.transmit(np.concatenate([s.samples for s in sent]), 0.0, tail_samples=300)
    scanner = FrameScanner(rx, demodulate=True)
    lookup = {3: (bits, power)}.get
    cuts = [0, 1234, 9000, 9001, 30000, stream.size]
    for a, b in zip(cuts[:-1], cuts[1:]):
        for at, res in scanner.feed(stream[a:b], lookup, final=b == stream.size):
            out += [int(at), res]
    return out


def _add(h, value) -> None:
    if isinstance(value, np.generic):  # numpy scalars hash as the Python number they equal
        value = value.item()
    if isinstance(value, np.ndarray):
        h.update(f"{value.dtype.str}{value.shape}".encode())
        h.update(np.ascontiguousarray(value).tobytes())
    else:
        h.update(repr(value).encode())


def digests(outputs: list) -> tuple[str, str]:
    """``(decisions, all)`` SHA-256 hex digests of :func:`received` outputs."""
    dec, full = hashlib.sha256(), hashlib.sha256()
    for item in outputs:
        if isinstance(item, int):
            _add(dec, item)
            _add(full, item)
            continue
        for name in ("reason", "start", "end", "header_ok", "map_seq", "counter",
                     "map_known", "symbols_used"):
            _add(dec, getattr(item, name))
            _add(full, getattr(item, name))
        if item.decided is not None:
            for part in item.decided:
                _add(dec, np.asarray(part))
                _add(full, np.asarray(part))
        for name in ("sync_metric", "cfo_hz", "channel", "noise_var", "snr_db"):
            _add(full, getattr(item, name))
    return dec.hexdigest(), full.hexdigest()


@pytest.fixture(scope="module")
def outputs():
    return received()


def test_streams_cover_every_outcome(outputs):
    """The pinned streams reach each outcome the digests are meant to guard."""
    frames = [o for o in outputs if not isinstance(o, int)]
    reasons = {f.reason for f in frames}
    assert reasons == {"", "crc_failed", "clipped", "no_sync", "truncated"}
    assert any(f.decided is not None for f in frames)
    assert any(f.has_estimate and not f.map_known for f in frames)
    assert sum(f.reason == "" for f in frames) >= 20


def _this_machine() -> str:
    features = getattr(getattr(np, "_core", None), "_multiarray_umath", None)
    features = getattr(features, "__cpu_features__", {})
    return f"{platform.machine()} {'with' if features.get('AVX512F') else 'without'} AVX-512"


@pytest.mark.skipif(".".join(np.__version__.split(".")[:2]) != PINNED_NUMPY
                    or _this_machine() != PINNED_MACHINE,
                    reason=f"digests pinned with numpy {PINNED_NUMPY} on {PINNED_MACHINE}")
def test_outputs_bit_exact(outputs):
    decisions, everything = digests(outputs)
    assert decisions == DECISIONS_SHA256
    assert everything == ALL_SHA256


if __name__ == "__main__":
    for label, value in zip(("DECISIONS_SHA256", "ALL_SHA256"), digests(received())):
        print(f'{label} = "{value}"')
