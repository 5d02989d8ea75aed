"""Receiver DSP throughput and SNR-estimate accuracy (1024-point FFT link).

Every time is the median over repeats, the receiver, the bare FFT and the reference called in
turn in one process (so a load change hits all alike and the ratios compare like with like).

The headline figures time the path the streaming sources use: a :class:`FrameScanner` fed a
stream of back-to-back frames in buffers of ``driver.radio.buffer_frames`` frames (its default,
4: the size the radio source reads; a feed estimates the frames it locates together, about as
many as the buffer holds, and what is left is carried into the next feed). The frames are the
same as the single-frame figures' (AWGN 20 dB, 4.1 kHz offset, 16-QAM) and so is the work per
frame: the map is looked up, so every frame gets the data-aided fit (the radio source has no
map lookup and takes the cheaper training-and-header fit). Each stream pass reads fresh
samples, as a radio does; the single-frame figures call the receiver on one block again and
again, which then stays in the cache.

* ``rx_msps``: complex samples per second (millions) that the scanner turns into estimates on
  one core, sync search included.
* ``rx_msps_vs_ref``: the same in millions of samples per reference time (``reference.py``),
  timed interleaved with the receiver: comparable between machines.
* ``rx_vs_fft``: scanner time over the time of the bare FFT of the same symbols, called as the
  receiver calls it: ``numpy.fft.fft`` on complex64, one call per frame over its symbols (the
  receiver transforms each frame of a batch right after derotating it, while it is in the
  cache).
* ``rx_vs_fft_fading``: the same on a stream through an EVA channel (70 Hz Doppler, 22 dB,
  -2.7 kHz offset) with a map of 0 to 8 bits and uneven power per tone, so that weak and off
  tones take the known-symbol fallback; informational.
* ``rx_msps_single``, ``rx_msps_single_vs_ref``, ``rx_vs_fft_single``: ``Receiver.receive`` on
  one block of one frame, against the FFT of that frame's symbols (one call); informational.
* ``rx_demod_vs_fft``: the single-frame figure with the final data decisions (second,
  leave-one-out decision pass, as the simulator uses to count bit errors); informational.
* ``snr_rmse_db_20``: RMS error (dB) of the per-tone SNR estimate of single frames at a true
  per-tone SNR of 20 dB (AWGN channel, 16-QAM on every data tone).

The allocator is warmed first (:func:`warm_allocator`); without it the figures depended on
which benchmarks had run before in the same process.
"""

from __future__ import annotations

import numpy as np
from reference import Reference, interleaved, median

from brimline.drivers.air.channel import LinkChannel
from brimline.drivers.link.frame import Transmitter, make_plan
from brimline.drivers.link.receiver import FrameScanner, Receiver

GOALS = {
    "rx_msps": ">= 45 Msample/s per core (streaming, radio-sized buffers)",
    "rx_msps_vs_ref": "Msamples per reference time (higher is better)",
    "rx_vs_fft": "<= 3.5 x bare FFT time (same symbols, same calls)",
    "rx_vs_fft_fading": "informational: the same, EVA 70 Hz, 22 dB, a mixed map",
    "rx_msps_single": "informational: one frame per call, Msample/s",
    "rx_msps_single_vs_ref": "informational: one frame per call, per reference time",
    "rx_vs_fft_single": "informational: one frame per call over its FFT",
    "rx_demod_vs_fft": "informational: one frame, estimates plus final data decisions",
    "snr_rmse_db_20": "raw per-tone estimate, one frame (lower is better)",
}

PLAN = dict(fft_size=1024, cp_len=72, sample_rate_hz=15.36e6, used_tones_half=400,
            pilot_spacing=8, train_symbols=2, data_symbols=28)

#: Frames per receive buffer: the default of ``driver.radio.buffer_frames``.
BUFFER_FRAMES = 4


def stream_workload(rx: Receiver, stream: np.ndarray, buffer_len: int, lookup):
    """The streaming workload and its FFT reference.

    Returns ``(scan, fft, frames)``: ``scan()`` feeds ``stream`` to a new
    :class:`FrameScanner` in buffers of ``buffer_len`` samples and returns what each feed
    found; ``fft()`` computes the bare FFT of the symbols of the frames found, as the receiver
    calls it (one call per frame over its symbols, complex64); ``frames`` is their number.
    """
    plan = rx.plan
    pieces = [stream[i:i + buffer_len] for i in range(0, stream.size, buffer_len)]

    def scan():
        scanner = FrameScanner(rx)
        return [scanner.feed(piece, lookup, final=i == len(pieces) - 1)
                for i, piece in enumerate(pieces)]

    frames = [np.ascontiguousarray(
        stream[at:at + plan.n_symbols * plan.symbol_len]
        .reshape(plan.n_symbols, plan.symbol_len)[:, :plan.fft_size])
        for feed in scan() for at, res in feed if res.has_estimate]

    def fft():
        for symbols in frames:
            np.fft.fft(symbols, axis=1)

    return scan, fft, len(frames)


def warm_allocator() -> None:
    """Free one 16 MB array first, as a long-running process will have: glibc then serves the
    receiver's and the FFT's megabyte temporaries from its heap instead of fresh memory maps
    (whose page faults made both several times slower, by how much depending on which
    benchmarks had run before)."""
    np.ones(2 << 20).sum()


def run(quick: bool = False) -> dict[str, float]:
    warm_allocator()
    rng = np.random.default_rng(20261201)
    plan = make_plan(**PLAN)
    tx, rx = Transmitter(plan), Receiver(plan)
    bits = np.full(plan.data_tones.size, 4)
    known = (bits, np.ones(bits.size))
    lookup = {1: known}.get
    channel = LinkChannel(plan, profile="awgn", snr_db=20.0, cfo_hz=4.1e3,
                          lead_max_samples=plan.cp_len * 4, rng=rng)
    frames = 4 if quick else 12
    blocks = []
    errors = []
    for i in range(frames):
        sent = tx.frame(bits=bits, power_lin=known[1], map_seq=1, counter=i, rng=rng)
        block = channel.transmit(sent.samples, 0.0, tail_samples=plan.cp_len)
        blocks.append(block)
        res = rx.receive(block, lookup)
        errors.append(res.snr_db - 20.0)
    rmse = float(np.sqrt(np.mean(np.concatenate(errors) ** 2)))

    # A stream of back-to-back frames, read in radio-sized buffers.
    count = 16
    buffer_len = BUFFER_FRAMES * plan.frame_len
    sent = [tx.frame(bits=bits, power_lin=known[1], map_seq=1, counter=i, rng=rng)
            for i in range(count)]
    stream = channel.transmit(np.concatenate([s.samples for s in sent]), 0.0,
                              tail_samples=plan.cp_len)
    scan, fft_frames, found = stream_workload(rx, stream, buffer_len, lookup)
    if found != count:
        raise RuntimeError(f"the scanner found {found} of {count} frames")
    # The same in a fading channel with a mixed map: weak and off tones take the known-symbol
    # fallback, some frames the refined offset.
    n = plan.data_tones.size
    mixed = (rng.integers(0, 9, n), rng.uniform(0.5, 2.0, n))
    fading = LinkChannel(plan, profile="eva", doppler_hz=70.0, snr_db=22.0, cfo_hz=-2.7e3,
                         lead_max_samples=plan.cp_len * 4, rng=rng)
    sent = [tx.frame(bits=mixed[0], power_lin=mixed[1], map_seq=2, counter=i, rng=rng)
            for i in range(count)]
    faded = fading.transmit(np.concatenate([s.samples for s in sent]), 0.0,
                            tail_samples=plan.cp_len)
    scan_fading, fft_fading, _ = stream_workload(rx, faded, buffer_len, {2: mixed}.get)

    # Medians over repeats, the workloads called in turn so that load hits all alike.
    repeats = 30 if quick else 90
    symbols = np.ascontiguousarray(
        blocks[0][:plan.n_symbols * plan.symbol_len].reshape(plan.n_symbols, plan.symbol_len)
        [:, plan.cp_len:])
    ref = Reference()
    t_fft, t_scan, t_ref, t_fft_fading, t_scan_fading = interleaved(
        [fft_frames, scan, ref.work, fft_fading, scan_fading], repeats, statistic=median)
    t_fft1, t_rx1, t_demod1, t_ref1 = interleaved([
        lambda: np.fft.fft(symbols, axis=1),
        lambda: rx.receive(blocks[0], lookup, demodulate=False),
        lambda: rx.receive(blocks[0], lookup, demodulate=True),
        ref.work], repeats * 4, statistic=median)
    return {
        "rx_msps": stream.size / t_scan / 1e6,
        "rx_msps_vs_ref": stream.size / t_scan / 1e6 * t_ref,
        "rx_vs_fft": t_scan / t_fft,
        "rx_vs_fft_fading": t_scan_fading / t_fft_fading,
        "rx_msps_single": blocks[0].size / t_rx1 / 1e6,
        "rx_msps_single_vs_ref": blocks[0].size / t_rx1 / 1e6 * t_ref1,
        "rx_vs_fft_single": t_rx1 / t_fft1,
        "rx_demod_vs_fft": t_demod1 / t_fft1,
        "snr_rmse_db_20": rmse,
    }


if __name__ == "__main__":
    for key, value in run(quick=True).items():
        print(f"{key:22s} {value:10.4g}   {GOALS[key]}")
