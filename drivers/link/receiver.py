"""Receiver of the link model: one block of samples in, one :class:`RxFrame` out.

:class:`Receiver` composes the three stages of the link's receiver DSP, each in its own module
and each built once per plan (all vectorized; one batched FFT per frame):

1. frame sync (:mod:`~brimline.drivers.link.sync`): Schmidl-Cox timing and fractional offset,
   integer and fine frequency offset, pilot phase tracking;
2. demodulation (:mod:`~brimline.drivers.link.demod`): the header bits, then hard decisions on
   the data symbols with the map the header names;
3. channel and noise fit (:mod:`~brimline.drivers.link.fit`): data-aided least squares per tone
   over the training, header and decided data rows, with the known-symbol fallback for tones
   whose decisions are unreliable.

Tones a narrowband interferer hits (3 dB above the local level of the training phase step)
take no part in the fine offset, the header vote or the other tones' noise pools.

:class:`FrameScanner` runs the receiver over a stream fed in pieces; :meth:`RxFrame.to_estimate`
turns a frame into the :class:`~brimline.daemon.records.Estimate` record the sources yield.
:class:`LinkTally` counts what a closed loop delivered: bit errors, frame errors (payload CRC)
and goodput.

Bad input never raises: a block without a frame, a truncated frame or a header failing its CRC
comes back as an RxFrame with ``reason`` set. After a failed CRC the estimate comes from the
training symbols alone with the noise pooled over neighbouring tones (one tone's training has a
single degree of freedom, and ``1/S`` then has no finite mean).

Speed: a frame costs a few hundred numpy calls, and their fixed cost, not the FFT, is most of
its time. Hence work arrays built once per plan, operands pre-cast to the type the arithmetic
runs in (a mixed-type ufunc casts through a buffer on every call), gathers with ``take`` in
mode "clip", and reductions called directly rather than through numpy's Python wrappers.
``tests/test_receiver_digest.py`` pins the outputs bit for bit, so such changes must leave every
floating-point operation and its order as it was.

Known limits: the estimate is a fit over one frame, so when ``f_D * T_frame`` passes about 0.2
the channel ages within the frame and the SNR reads lower (it is the SNR this receiver delivers);
a delay spread that nearly fills the cyclic prefix (ETU with the default 32-sample prefix) caps
the SNR through inter-symbol interference; a strong narrowband interferer leaks into its
neighbours and, in whole-band fades, still costs headers. The FFT is numpy's; speed figures are
ratios to that same FFT, so they compare the receiver with what it actually calls.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from brimline.daemon.records import Estimate, TonePlan
from brimline.drivers.link.demod import HeaderDemod, MapLookup, MapTableCache, decide
from brimline.drivers.link.fit import ChannelFit, local_level, squared_magnitude
from brimline.drivers.link.frame import (
    GRAY,
    FrameFormat,
    bit_errors,
    decode_header,
    payload_data_bits,
    payload_ok,
)
from brimline.drivers.link.sync import FrameSync

__all__ = ["Receiver", "RxFrame", "MapLookup", "FrameScanner", "LinkTally"]

#: Fine offset (tone spacings) above which a frame is transformed again with it.
_REFINE_TONES = 0.01


@dataclass(frozen=True)
class RxFrame:
    """What the receiver made of one block.

    Attributes
    ----------
    reason : str
        "" for a good frame, else why it is flagged: "no_sync", "truncated", "clipped",
        "crc_failed" (the last two still carry estimates).
    start : int
        Sample index of the sync symbol's FFT window in the block (-1 without sync).
    end : int
        Sample index just after the frame (where the next search may begin).
    sync_metric : float
        Schmidl-Cox metric at the chosen start (coarse maximum without sync).
    cfo_hz : float
        Total frequency offset estimate in hertz.
    header_ok : bool
        Whether the header passed its CRC.
    map_seq : int
        Map sequence number from the header (-1 for the default map or a failed header).
    counter : int
        Frame counter from the header (-1 when the header failed).
    map_known : bool
        Whether the data symbols were demodulated (the map was known).
    channel, noise_var, snr_db : ndarray or None
        Per data tone: channel at nominal power, noise variance and SNR in dB.
    decided : tuple or None
        Decided (I level, Q level, Q bits) indices when the map was known; see ``values``.
    symbols_used : int
        Symbols per tone in the least-squares estimate (decision-directed tones; tones with
        unreliable decisions use the known rows only, with noise pooled over neighbours).
    """

    reason: str
    start: int = -1
    end: int = 0
    sync_metric: float = 0.0
    cfo_hz: float = 0.0
    header_ok: bool = False
    map_seq: int = -1
    counter: int = -1
    map_known: bool = False
    channel: np.ndarray | None = None
    noise_var: np.ndarray | None = None
    snr_db: np.ndarray | None = None
    decided: tuple | None = None
    symbols_used: int = 0

    @property
    def values(self) -> np.ndarray | None:
        """Decided symbol values, shape (data symbols, data tones), when the map was known."""
        if self.decided is None:
            return None
        i_idx, q_idx, b_q = self.decided
        return (GRAY[i_idx] << b_q) | GRAY[q_idx]

    @property
    def has_estimate(self) -> bool:
        """True when the frame carries a channel estimate."""
        return self.channel is not None

    def to_estimate(self, *, plan: TonePlan, frame: int, time_s: float) -> Estimate:
        """The :class:`~brimline.daemon.records.Estimate` record of this frame.

        Parameters
        ----------
        plan : TonePlan
            The plan the frame was received with (its id, data tones and ``center_hz``, NaN
            when the plan has none).
        frame : int
            Frame number of the source.
        time_s : float
            Time of the frame on the source's clock.

        Returns
        -------
        Estimate
            With ``valid`` false for a "clipped" frame and the sync metric clamped to [0, 1].

        Raises
        ------
        ValueError
            When the frame carries no estimate (see :attr:`has_estimate`).
        """
        if not self.has_estimate:
            raise ValueError(f"frame reason={self.reason!r} carries no estimate")
        return Estimate(
            frame=frame, time_s=time_s, plan_id=plan.plan_id, tone_index=plan.data_tones,
            channel=self.channel, noise_var=self.noise_var, snr_db=self.snr_db,
            map_seq_seen=self.map_seq, sync_metric=min(max(self.sync_metric, 0.0), 1.0),
            cfo_hz=self.cfo_hz, header_ok=self.header_ok, valid=self.reason != "clipped",
            center_hz=getattr(plan, "center_hz", math.nan))


class Receiver:
    """Receiver DSP for one plan; build once, call :meth:`receive` per block.

    Parameters
    ----------
    plan : TonePlan
        The link plan (a bare TonePlan gets the default frame layout).
    default_bits : int
        Bits per data tone of the default map (header sequence -1), at nominal power.
    sync_threshold : float
        Schmidl-Cox metric (0..1) above which a frame is detected.
    clip_level : float or None
        Flag the frame "clipped" when more than ``clip_fraction`` of its samples have ``|I|`` or
        ``|Q|`` at or above this level (None: no check).
    clip_fraction : float
        Fraction of samples at the clip level that flags a frame.

    Attributes
    ----------
    format : FrameFormat
        The plan's frame tables.
    sync : FrameSync
        Timing, frequency offset and phase tracking.
    fit : ChannelFit
        Channel and noise fit.
    header : HeaderDemod
        Header bit combining.
    maps : MapTableCache
        Demodulation tables of the default and recent maps.

    Notes
    -----
    A receiver keeps work arrays that every frame reuses (the spectra, the fit's row values),
    so one receiver serves one thread at a time; the arrays of an :class:`RxFrame` are its own.
    """

    def __init__(self, plan: TonePlan, *, default_bits: int = 2, sync_threshold: float = 0.3,
                 clip_level: float | None = None, clip_fraction: float = 1e-4) -> None:
        fmt = FrameFormat(plan)
        self.format, self.plan = fmt, fmt.plan
        plan = self.plan
        self.sync = FrameSync(fmt, sync_threshold)
        self.clip_level = clip_level
        self.clip_fraction = float(clip_fraction)
        self.fit = ChannelFit(plan)
        self.header = HeaderDemod(fmt)
        self.maps = MapTableCache(plan.data_tones.size, default_bits)
        train = fmt.train.astype(np.float32)
        self._train_mean = (train / plan.train_symbols).astype(np.complex64)
        self._train_data = train[fmt.data_pos]
        # Work array reused by every frame (it never reaches an RxFrame): the known or decided
        # values of the fit's rows.
        self._x = np.empty((plan.n_symbols - 1, fmt.data_pos.size), np.complex64)
        self._x[:plan.train_symbols] = self._train_data
        self._bins: dict[int, tuple[np.ndarray, np.ndarray, np.ndarray]] = {}

    def _bins_for(self, shift: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """FFT bins of the used, pilot and data tones under an integer offset (cached)."""
        found = self._bins.get(shift)
        if found is None:
            fmt = self.format
            bins = (fmt.used_bins + shift) % self.plan.fft_size
            found = self._bins[shift] = (bins, bins[fmt.pilot_pos], bins[fmt.data_pos])
        return found

    @property
    def sync_threshold(self) -> float:
        """Schmidl-Cox metric above which a frame is detected."""
        return self.sync.threshold

    def receive(self, block: np.ndarray, lookup: MapLookup | None = None, *,
                demodulate: bool = True) -> RxFrame:
        """Find the first frame in ``block`` and estimate the channel from it.

        Parameters
        ----------
        block : ndarray of complex
            Baseband samples; converted to complex64.
        lookup : callable, optional
            ``lookup(map_seq) -> (bits, power_lin)`` for maps other than the default; without
            it (or when it returns None) the estimate uses the training symbols and header only.
        demodulate : bool
            Also make the final data decisions (``RxFrame.decided``, a second decision pass with
            the leave-one-out channel). The estimate does not depend on it.

        Returns
        -------
        RxFrame
            Never raises for bad samples; see ``RxFrame.reason``.
        """
        r = np.ascontiguousarray(block, dtype=np.complex64).ravel()
        plan = self.plan
        n, s = plan.fft_size, plan.symbol_len
        if r.size < 2 * n + plan.cp_len:
            return RxFrame("truncated" if r.size else "no_sync", end=r.size)
        sync = self.sync.find(r)
        if sync is None or not sync.found:
            metric = 0.0 if sync is None else sync.metric
            # Nothing here: the next search may begin where a frame could still start.
            return RxFrame("no_sync", end=max(r.size - plan.frame_len, 1), sync_metric=metric)
        d0, metric = sync.start, sync.metric
        end = d0 + (plan.n_symbols - 1) * s + n
        if end > r.size:
            return RxFrame("truncated", start=d0, end=max(d0 - plan.cp_len, 1),
                           sync_metric=metric)
        return self._estimate(r, d0, end, metric, sync.fraction_tones, lookup, demodulate)

    def _estimate(self, r, d0, end, metric, eps_frac, lookup, demodulate,
                  refine=True) -> RxFrame:
        plan, fmt = self.plan, self.format
        n, t = plan.fft_size, plan.train_symbols
        spectra = self.sync.spectra(r, d0, eps_frac)
        shift = self.sync.integer_shift(spectra)
        bins, pilot_bins, data_bins = self._bins_for(shift)
        # Per-symbol phase step from the identical training symbols (all offsets together).
        # Gathers in mode "clip": the bins are always in range, and the default mode checks
        # every index (and buffers an ``out``).
        head = spectra[1:t + 2].take(bins, axis=1, mode="clip")  # training symbols, header
        if t == 2:
            step = np.conj(head[0])
            step *= head[1]
        else:
            step = (np.conj(head[:t - 1]) * head[1:t]).sum(axis=0)
        # Tones a narrowband interferer dominates take no part: its own phase step would bias
        # the offset (and, through the time-domain correction, cost every tone some ICI).
        mag = np.abs(step)  # |H|^2 n per tone
        level = local_level(mag)
        hit = mag > 2.0 * level  # 3 dB above the local level
        step[hit] = 0.0
        total = step.sum()
        theta = float(np.arctan2(total.imag, total.real))  # np.angle without its wrapper
        eps_fine = self.sync.fine_offset_tones(theta, eps_frac, shift)
        if refine and abs(eps_fine) > _REFINE_TONES:
            # The sync offset was off (an interferer's share of the sync correlation biases it):
            # transform again with the fine offset, or the residual leaks between tones.
            return self._estimate(r, d0, end, metric, eps_frac + eps_fine, lookup, demodulate,
                                  refine=False)
        cfo_tones = eps_frac + shift + eps_fine
        phase = self.sync.symbol_phase(theta)
        head *= phase[1:t + 2, None]
        h_train = head[0] + head[1] if t == 2 else head[:t].sum(axis=0)
        h_train *= self._train_mean  # training sign / t
        # Header: maximal-ratio combining of the repeated BPSK bits, robust to a narrowband
        # interferer (which would otherwise outvote the good copies of its bit).
        soft_bits = self.header.soft(head, h_train, hit, level * (1.0 / n))
        header_ok, seq, counter = decode_header((soft_bits < 0).astype(np.uint8))
        # Data symbols: remove the residual phase drift measured on the pilots.
        y_pilot = spectra[t + 2:].take(pilot_bins, axis=1, mode="clip")
        row_phase = self.sync.row_phase(y_pilot, h_train.take(fmt.pilot_pos, mode="clip"),
                                        phase)
        # Least squares over every symbol with known tone values: training, header, data.
        dp = fmt.data_pos
        rows = spectra[1:].take(data_bins, axis=1, mode="clip")  # (rows, data tones)
        rows *= row_phase[:, None]
        x = self._x  # training rows preset; data rows are filled by the decisions
        if header_ok:  # the header row is known once its CRC passes
            x[t] = self.header.known_row(soft_bits)
        else:
            x[t] = 0.0
            rows[t] = 0.0  # an unknown header row takes no part
        tables = self.maps.tables_for(seq if header_ok else None, lookup)
        known = t + int(header_ok)
        if tables is not None:
            # Decide with the training channel; fit level and slope with those decisions (the
            # estimate); decide again with the leave-one-out channel (the demodulated data).
            h_data = h_train.take(dp, mode="clip")  # one channel per tone
            decide(rows[t + 1:], h_data, tables, points=x[t + 1:])
            h, h_rows, noise_var = self.fit.data_aided(rows, x, known, tables.reliable_snr,
                                                       hit[dp], leave_one_out=demodulate)
            used, decided = known + plan.data_symbols, None
            if demodulate:
                idx = decide(rows[t + 1:], h_rows[t + 1:], tables).astype(np.uint8)
                decided = (idx[..., 0], idx[..., 1], tables.b_q)
        elif known < 3:
            # Training alone (the header failed): one degree of freedom per tone, S ~ sigma^2
            # Gamma(1), and 1/S has no finite mean (AWGN at 20 dB: +2.5 dB mean, tones up to
            # 46 dB high). The noise pooled over neighbouring tones has ~17 and is unbiased.
            h, noise_var = self.fit.known_rows(rows, x, known, hit[dp])
            used, decided = known, None
        else:
            h, noise_var = self.fit.known_constant(rows, x, known)
            used, decided = known, None
        noise_var = np.maximum(noise_var, 1e-30)
        snr_db = squared_magnitude(h) / noise_var
        np.maximum(snr_db, 1e-30, out=snr_db)
        np.log10(snr_db, out=snr_db)
        snr_db *= 10.0
        reason = "" if header_ok else "crc_failed"
        if self.clip_level is not None:
            frame = r[max(d0 - plan.cp_len, 0):end]
            hits = np.count_nonzero((np.abs(frame.real) >= self.clip_level)
                                    | (np.abs(frame.imag) >= self.clip_level))
            if hits > self.clip_fraction * frame.size:
                reason = "clipped"
        return RxFrame(
            reason=reason, start=d0, end=end, sync_metric=metric,
            cfo_hz=cfo_tones * plan.tone_spacing_hz, header_ok=header_ok,
            map_seq=seq if header_ok else -1, counter=counter if header_ok else -1,
            map_known=tables is not None, channel=h, noise_var=noise_var, snr_db=snr_db,
            decided=decided, symbols_used=used)


class FrameScanner:
    """Finds successive frames in a stream of samples fed in pieces (recordings, radio buffers).

    Parameters
    ----------
    receiver : Receiver
        The receiver DSP.
    demodulate : bool
        Make the final data decisions too (not needed for estimates).

    Notes
    -----
    The search window is two frames long; without a frame it advances by one frame length, so
    every possible frame start is searched with the whole frame inside the window.
    """

    def __init__(self, receiver: Receiver, *, demodulate: bool = False) -> None:
        self.receiver = receiver
        self.demodulate = bool(demodulate)
        self._buffer = np.zeros(0, np.complex64)
        self._offset = 0  # absolute index of self._buffer[0]

    @property
    def offset(self) -> int:
        """Absolute sample index of the first sample not yet consumed."""
        return self._offset

    def feed(self, samples: np.ndarray, lookup: MapLookup | None = None, *,
             final: bool = False) -> list[tuple[int, RxFrame]]:
        """Add samples; return ``(absolute start, RxFrame)`` for every frame found or flagged.

        Flagged entries (``reason`` "no_sync" per search window, "truncated" only at the end of
        a ``final`` feed) have no estimate. Samples that may still hold a frame are kept.
        """
        buf = np.concatenate([self._buffer, np.asarray(samples, dtype=np.complex64).ravel()])
        window = 2 * self.receiver.plan.frame_len
        pos, out = 0, []
        while buf.size - pos >= (window if not final else 1):
            res = self.receiver.receive(buf[pos:pos + window], lookup, demodulate=self.demodulate)
            at_end = pos + window >= buf.size
            if res.reason == "truncated" and not (final and at_end):
                if res.start < 0 or res.end <= 0:
                    break
                pos += res.end  # the frame starts later in the window: search again from there
                continue
            if res.reason in ("no_sync", "truncated"):
                if res.start >= 0 or res.reason == "no_sync":  # a short noise tail is no loss
                    out.append((self._offset + pos + max(res.start, 0), res))
                if final and at_end:
                    pos = buf.size
                    break
                pos += max(res.end, 1)
                continue
            out.append((self._offset + pos + res.start, res))
            pos += res.end
        self._buffer = buf[pos:].copy()
        self._offset += pos
        return out


class LinkTally:
    """What a link delivered, frame by frame: bit errors, frame errors and goodput.

    Parameters
    ----------
    frame_period_s : float
        Link time per frame sent, s (``1 / frame_rate_hz``): goodput is per second of link time.

    Attributes
    ----------
    frames : int
        Frames sent whose map carries a payload (the frame error rate's denominator).
    frames_ok : int
        Of those, frames decoded with the map their header names and whose payload CRC passed.
    frames_lost : int
        Frames with a payload that were not demodulated at all (no sync, header failed, map
        unknown): frame errors with no bit count.
    crc_missed : int
        Frames whose CRC passed although bits were wrong (known only where the sent bits are,
        as in simulation; the CRC-32 misses about one error pattern in 2^32).
    bits, bit_errors : int
        Payload bits demodulated (CRC included) and how many were wrong.
    goodput_bits : int
        Data bits (CRC excluded) of the frames counted in ``frames_ok``.
    sent : int
        Every frame sent, with or without payload (the link time).

    Notes
    -----
    The frame error rate counts lost frames as errors; the bit error rate is over the frames
    that were demodulated (a lost frame has no bits to compare).
    """

    def __init__(self, frame_period_s: float) -> None:
        self.frame_period_s = float(frame_period_s)
        self.sent = self.frames = self.frames_ok = self.frames_lost = self.crc_missed = 0
        self.bits = self.bit_errors = self.goodput_bits = 0

    def add(self, sent_values: np.ndarray, bits: np.ndarray,
            received_values: np.ndarray | None) -> bool:
        """Count one frame sent with ``bits`` per tone.

        Parameters
        ----------
        sent_values : ndarray of int, shape (data symbols, data tones)
            Symbol values sent (payload CRC included).
        bits : ndarray of int, shape (data tones,)
            The map the frame was sent with.
        received_values : ndarray or None
            Symbol values decided with that map; None when the frame was not demodulated with
            it (lost).

        Returns
        -------
        bool
            Whether the frame's payload was delivered (decoded and its CRC passed).
        """
        self.sent += 1
        sent_values = np.asarray(sent_values)
        data_bits = payload_data_bits(bits, sent_values.shape[0])
        if data_bits == 0:
            return False
        self.frames += 1
        if received_values is None:
            self.frames_lost += 1
            return False
        errors = bit_errors(sent_values, received_values)
        self.bits += int(np.asarray(bits, dtype=np.int64).sum()) * sent_values.shape[0]
        self.bit_errors += errors
        if not payload_ok(received_values, bits):
            return False
        self.crc_missed += errors > 0
        self.frames_ok += 1
        self.goodput_bits += data_bits
        return True

    @property
    def link_time_s(self) -> float:
        """Link time of the frames sent, s."""
        return self.sent * self.frame_period_s

    def summary(self) -> dict:
        """The counts and rates as a plain dict (the status message's ``link`` block).

        Returns
        -------
        dict
            ``frames``, ``frames_ok``, ``frame_errors``, ``frames_lost``, ``bits``,
            ``bit_errors``, ``goodput_bits``, ``link_time_s``, ``frame_error_rate`` and
            ``bit_error_rate`` (None before any), ``goodput_bps``.
        """
        errors = self.frames - self.frames_ok
        time_s = self.link_time_s
        return {"frames": self.frames, "frames_ok": self.frames_ok, "frame_errors": errors,
                "frames_lost": self.frames_lost, "bits": self.bits,
                "bit_errors": self.bit_errors, "goodput_bits": self.goodput_bits,
                "link_time_s": time_s,
                "frame_error_rate": errors / self.frames if self.frames else None,
                "bit_error_rate": self.bit_errors / self.bits if self.bits else None,
                "goodput_bps": self.goodput_bits / time_s if time_s > 0 else None}
