"""Several frames per pass (``Receiver.estimate``, ``FrameScanner``) against one frame per call.

The receiver's accuracy is checked against outside references in ``test_ofdm.py`` (exact
Gray-QAM error rates, the Cramer-Rao bound, Schmidl and Cox) and pinned bit for bit in
``test_receiver_digest.py``. The batched path must add nothing of its own: every frame it
estimates among others must equal, bit for bit (values and dtypes), what
``Receiver.receive`` gives for that frame's search window alone, whatever the other frames of
the batch are (another map, a failed header, an unknown map, a narrowband interferer that
makes the receiver transform a frame twice, another integer frequency offset, clipping).
The reference scanner below is the one-frame-per-call loop the scanner used before batching.
"""

from __future__ import annotations

import numpy as np
import pytest

from brimline.drivers.air.channel import LinkChannel
from brimline.drivers.link.frame import Transmitter, make_plan
from brimline.drivers.link.receiver import FrameScanner, Receiver, RxFrame

PLAN = make_plan()


def _same(a: RxFrame, b: RxFrame) -> None:
    """Assert two RxFrames are equal field for field, arrays bit for bit with their dtypes."""
    for name in ("reason", "start", "end", "sync_metric", "cfo_hz", "header_ok", "map_seq",
                 "counter", "map_known", "symbols_used"):
        assert getattr(a, name) == getattr(b, name), name
    for name in ("channel", "noise_var", "snr_db"):
        x, y = getattr(a, name), getattr(b, name)
        assert (x is None) == (y is None), name
        if x is not None:
            assert x.dtype == y.dtype and x.shape == y.shape, name
            assert x.tobytes() == y.tobytes(), name
    assert (a.decided is None) == (b.decided is None)
    if a.decided is not None:
        for p, q in zip(a.decided, b.decided):
            assert np.array_equal(p, q)


def reference_scan(rx: Receiver, stream: np.ndarray, lookup, demodulate: bool):
    """The scanner's loop one frame per call (``Receiver.receive`` per window), as it was."""
    window, pos, out = 2 * rx.plan.frame_len, 0, []
    while stream.size - pos >= 1:
        res = rx.receive(stream[pos:pos + window], lookup, demodulate=demodulate)
        at_end = pos + window >= stream.size
        if res.reason == "truncated" and not at_end:
            if res.start < 0 or res.end <= 0:
                break
            pos += res.end
            continue
        if res.reason in ("no_sync", "truncated"):
            if res.start >= 0 or res.reason == "no_sync":
                out.append((pos + max(res.start, 0), res))
            if at_end:
                break
            pos += max(res.end, 1)
            continue
        out.append((pos + res.start, res))
        pos += res.end
    return out


def mixed_stream(rng):
    """Frames that take every path of the receiver, back to back and with gaps.

    Returns ``(stream, lookup)``: known maps 3 and 5, the default map, an unknown map (7), a
    frame whose header symbol is inverted (its CRC fails), a clipped stretch, noise gaps.
    """
    n = PLAN.data_tones.size
    tx = Transmitter(PLAN)
    maps = {3: (np.full(n, 4), np.ones(n)),
            5: (rng.integers(0, 7, n), rng.uniform(0.5, 2.0, n))}
    pieces = []
    channels = [
        LinkChannel(PLAN, profile="eva", doppler_hz=20.0, snr_db=24.0, cfo_hz=1.1e3,
                    lead_max_samples=50, rng=rng),
        # A narrowband interferer: frames transformed twice (the refined offset).
        LinkChannel(PLAN, profile="epa", doppler_hz=5.0, snr_db=25.0, cfo_hz=-900.0,
                    lead_max_samples=50, interferer_tone=23.4, interferer_db=20.0, rng=rng),
        # A large offset: another integer shift than the other frames of a batch.
        LinkChannel(PLAN, profile="awgn", snr_db=18.0, cfo_hz=3.3 * PLAN.tone_spacing_hz,
                    lead_max_samples=40, rng=rng),
    ]
    seqs = [3, 5, -1, 7, 3]
    counter = 0
    for ch in channels:
        for seq in seqs:
            bits, power = maps.get(seq, (np.full(n, 2), np.ones(n)))
            sent = tx.frame(bits=bits, power_lin=power, map_seq=seq, counter=counter, rng=rng)
            counter += 1
            block = ch.transmit(sent.samples, 0.0, tail_samples=int(rng.integers(0, 400)))
            pieces.append(block.astype(np.complex64))
    # Invert one frame's header symbol (its CRC fails; the frames around it are unharmed).
    damaged = pieces[6].copy()
    start = Receiver(PLAN).receive(damaged).start
    head = start + (1 + PLAN.train_symbols) * PLAN.symbol_len
    damaged[head:head + PLAN.fft_size] *= -1
    pieces[6] = damaged
    # Noise alone between frames, long enough for a search window without a frame.
    noise = 0.01 * (rng.standard_normal(3 * PLAN.frame_len)
                    + 1j * rng.standard_normal(3 * PLAN.frame_len))
    pieces.insert(9, noise.astype(np.complex64))
    stream = np.concatenate(pieces)
    return stream, lambda seq: maps.get(seq)


@pytest.fixture(scope="module")
def stream():
    return mixed_stream(np.random.default_rng(20261203))


@pytest.mark.parametrize("batch_frames", [1, 3, 8])
@pytest.mark.parametrize("demodulate", [False, True])
def test_scanner_equals_one_frame_per_call(stream, batch_frames, demodulate):
    """Every frame of a stream fed in pieces: the same outputs as ``receive`` per window."""
    samples, lookup = stream
    rx = Receiver(PLAN)
    expected = reference_scan(Receiver(PLAN), samples, lookup, demodulate)
    scanner = FrameScanner(rx, demodulate=demodulate, batch_frames=batch_frames)
    got = []
    cuts = [0, 5000, 3 * PLAN.frame_len, 3 * PLAN.frame_len + 1, 9 * PLAN.frame_len,
            samples.size]
    for a, b in zip(cuts[:-1], cuts[1:]):
        got += scanner.feed(samples[a:b], lookup, final=b == samples.size)
    assert [at for at, _ in got] == [at for at, _ in expected]
    for (_, a), (_, b) in zip(got, expected):
        _same(a, b)
    reasons = {res.reason for _, res in got}
    assert {"", "crc_failed", "no_sync"} <= reasons  # the paths the stream is meant to take
    assert any(res.has_estimate and not res.map_known for _, res in got)


def test_failed_frame_is_flagged_alone():
    """A frame whose header fails, in one batch with good ones, is the only one flagged, and
    the others keep their counters and estimates."""
    rng = np.random.default_rng(11)
    n = PLAN.data_tones.size
    tx = Transmitter(PLAN)
    ch = LinkChannel(PLAN, profile="eva", doppler_hz=10.0, snr_db=24.0, cfo_hz=700.0,
                     lead_max_samples=30, rng=rng)
    blocks = [ch.transmit(tx.frame(bits=np.full(n, 2), power_lin=np.ones(n), map_seq=-1,
                                   counter=i, rng=rng).samples, 0.0, tail_samples=100)
              .astype(np.complex64) for i in range(6)]
    start = Receiver(PLAN).receive(blocks[3]).start
    head = start + (1 + PLAN.train_symbols) * PLAN.symbol_len
    blocks[3][head:head + PLAN.fft_size] *= -1  # the header symbol inverted: its CRC fails
    got = FrameScanner(Receiver(PLAN), batch_frames=8).feed(np.concatenate(blocks), final=True)
    frames = [res for _, res in got if res.has_estimate]
    assert [res.reason for res in frames] == ["", "", "", "crc_failed", "", ""]
    assert [res.counter for res in frames] == [0, 1, 2, -1, 4, 5]
    assert all(np.isfinite(res.snr_db).all() for res in frames)


def flat_blocks(rng, count: int) -> list[np.ndarray]:
    """``count`` frames (2 bits on every tone, default map, counters 0, 1, ...) through a flat
    channel at 25 dB, each received block with its tail."""
    n = PLAN.data_tones.size
    tx = Transmitter(PLAN)
    ch = LinkChannel(PLAN, profile="flat", snr_db=25.0, lead_max_samples=30, rng=rng)
    return [ch.transmit(tx.frame(bits=np.full(n, 2), power_lin=np.ones(n), map_seq=-1,
                                 counter=i, rng=rng).samples, 0.0, tail_samples=100)
            for i in range(count)]


def test_clipped_frame_among_clean_ones():
    """The clip check counts each frame's own samples (from its cyclic prefix on)."""
    rng = np.random.default_rng(7)
    blocks = flat_blocks(rng, 3)
    level = 0.5 * float(np.abs(blocks[1].real).max())
    blocks[0] *= 0.2  # well below the clip level: only the middle frame is clipped
    blocks[2] *= 0.2
    blocks[1] = (np.clip(blocks[1].real, -level, level)
                 + 1j * np.clip(blocks[1].imag, -level, level))
    samples = np.concatenate(blocks).astype(np.complex64)
    rx = Receiver(PLAN, clip_level=level)
    got = FrameScanner(rx, batch_frames=8).feed(samples, final=True)
    expected = reference_scan(Receiver(PLAN, clip_level=level), samples, None, False)
    assert [res.reason for _, res in got] == [res.reason for _, res in expected]
    assert [res.reason for _, res in got if res.has_estimate].count("clipped") == 1
    for (_, a), (_, b) in zip(got, expected):
        _same(a, b)


def test_estimate_of_nothing_is_empty():
    assert Receiver(PLAN).estimate(np.zeros(10, np.complex64), []) == []


def test_batch_frames_must_be_positive():
    with pytest.raises(ValueError, match=r"batch_frames=0 must be >= 1"):
        FrameScanner(Receiver(PLAN), batch_frames=0)


def test_non_finite_samples_stay_in_their_frame():
    """NaN samples in one frame's data symbols spoil that frame's estimate alone: the frames
    batched with it are the same as without the damage, and nothing raises."""
    rng = np.random.default_rng(13)
    blocks = [b.astype(np.complex64) for b in flat_blocks(rng, 4)]
    clean = np.concatenate(blocks)
    damaged = [b.copy() for b in blocks]
    damaged[1][-5 * PLAN.symbol_len:-4 * PLAN.symbol_len] = np.nan  # a data symbol
    with np.errstate(invalid="ignore"):
        got = FrameScanner(Receiver(PLAN), batch_frames=8).feed(np.concatenate(damaged),
                                                                final=True)
    want = FrameScanner(Receiver(PLAN), batch_frames=8).feed(clean, final=True)
    assert len(got) == len(want) == 4
    for k in (0, 2, 3):
        _same(got[k][1], want[k][1])
    assert not np.isfinite(got[1][1].snr_db).all()
