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

Several frames per pass: :meth:`Receiver.locate` is the sync search of one block and
:meth:`Receiver.estimate` estimates any number of located frames of one buffer together, every
step over a leading frame axis (:meth:`Receiver.receive` is the two for one frame).
:class:`FrameScanner`, which the streaming sources (radio, recorded IQ, IQ over ZeroMQ) feed,
locates the frames of each feed one window after another and then estimates them together.
No step mixes frames, so a frame's outputs are the same alone or in a batch, bit for bit
(``tests/test_receiver_batch.py``), and a frame that fails is flagged on its own. A call with
one frame (``receive``, which the simulator and the lockstep paths call per frame) drops the
frame axis: every step takes ``([frames,] ...)`` arrays (index with ``...`` and ``axis=-1``,
never ``[:, k]``), since each numpy call costs more per added dimension and a one-frame call is
mostly such fixed costs. Per-call Python lists and groups are built only when frames differ.

Speed: a frame costs a few hundred numpy calls, and their fixed cost, not the FFT, is much of
its time; a batch pays them once. Hence also work arrays built once per plan, operands
pre-cast to the type the arithmetic runs in (a mixed-type ufunc casts through a buffer on every
call), gathers with ``take`` in mode "clip" from contiguous sources (``take`` copies a strided
one first), and reductions called directly rather than through numpy's Python wrappers.
``tests/test_receiver_digest.py`` pins the outputs bit for bit, so such changes must leave every
floating-point operation and its order as it was; a product summed over rows stays one
matrix product per frame (a stacked ``matmul``; one product over all frames' columns, or a
matrix-vector product in place of per-frame dot products, may sum in another order).

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
from typing import NamedTuple, Sequence

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
from brimline.drivers.link.sync import FrameSync, SyncPoint

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
    frame_span : int
        Samples from a frame's sync symbol FFT window to the end of the frame.

    Notes
    -----
    A receiver keeps work arrays that every frame reuses (the spectra, the fit's row values,
    grown to the largest batch), so one receiver serves one thread at a time; the arrays of an
    :class:`RxFrame` are not work arrays (a batch's frames may share a parent array).
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
        self._x = np.empty((1, plan.n_symbols - 1, fmt.data_pos.size), np.complex64)
        self._x[:, :plan.train_symbols] = self._train_data
        #: Samples from a frame's sync symbol FFT window to its end.
        self.frame_span = (plan.n_symbols - 1) * plan.symbol_len + plan.fft_size
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
        flagged, point = self.locate(r)
        if point is None:
            return flagged
        return self.estimate(r, [(0, point)], lookup, demodulate=demodulate)[0]

    def locate(self, r: np.ndarray) -> tuple[RxFrame | None, SyncPoint | None]:
        """The sync step of :meth:`receive`: the first frame that lies wholly inside ``r``.

        Parameters
        ----------
        r : ndarray of complex64
            Contiguous baseband samples.

        Returns
        -------
        tuple
            ``(None, point)`` for such a frame (``point.start``: its sync symbol's FFT window
            in ``r``), else ``(flagged, None)`` with the RxFrame that :meth:`receive` returns
            ("no_sync" or "truncated").
        """
        plan = self.plan
        n = plan.fft_size
        if r.size < 2 * n + plan.cp_len:
            return RxFrame("truncated" if r.size else "no_sync", end=r.size), None
        sync = self.sync.find(r)
        if sync is None or not sync.found:
            metric = 0.0 if sync is None else sync.metric
            # Nothing here: the next search may begin where a frame could still start.
            return RxFrame("no_sync", end=max(r.size - plan.frame_len, 1),
                           sync_metric=metric), None
        if sync.start + self.frame_span > r.size:
            return RxFrame("truncated", start=sync.start, end=max(sync.start - plan.cp_len, 1),
                           sync_metric=sync.metric), None
        return None, sync

    def estimate(self, r: np.ndarray, found: Sequence[tuple[int, SyncPoint]],
                 lookup: MapLookup | None = None, *, demodulate: bool = True) -> list[RxFrame]:
        """Estimate the channel from several located frames of one buffer in one pass.

        Parameters
        ----------
        r : ndarray of complex64
            Contiguous baseband samples holding every frame.
        found : sequence of (int, SyncPoint)
            Per frame, the offset in ``r`` of the block it was located in and :meth:`locate`'s
            point in that block (``offset + point.start`` is its start in ``r``), in stream
            order. Each frame must lie wholly inside its block.
        lookup : callable, optional
            As for :meth:`receive`; asked in frame order.
        demodulate : bool
            As for :meth:`receive`.

        Returns
        -------
        list of RxFrame
            One per frame, each equal to what :meth:`receive` gives for its block (positions
            relative to that block).

        Notes
        -----
        The frames share the numpy calls, not the arithmetic: one batched FFT over all their
        symbols, then each step (integer and fine offset, the pilot phase line, header
        combining, decisions, channel fit, SNR) once over a leading frame axis. The header CRC,
        the map lookup and a few scalars run once per frame. Since no step mixes frames, each
        frame's outputs are those of its own :meth:`receive`, bit for bit
        (``tests/test_receiver_digest.py`` checks both paths). Frames that fail (no map, a
        failed header, clipping) are flagged one by one; the others are unaffected.
        """
        if not found:
            return []
        if len(found) == 1:  # no comprehensions (each is a function call)
            offset, point = found[0]
            starts, eps = [offset + point.start], [point.fraction_tones]
        else:
            starts = [offset + point.start for offset, point in found]
            eps = [point.fraction_tones for _, point in found]
        spectra = self.sync.spectra(r, starts, eps)
        # One frame drops the frame axis: every step takes arrays with or without it, and a
        # numpy call costs more per added dimension (a one-frame call is mostly such costs).
        work = spectra[0] if len(found) == 1 else spectra
        offsets = self._offsets(work, eps)
        if len(found) == 1:
            redo = [0] if abs(offsets.eps_fine[0]) > _REFINE_TONES else []
        else:
            redo = [k for k, fine in enumerate(offsets.eps_fine) if abs(fine) > _REFINE_TONES]
        if redo:
            # The sync offset was off (an interferer's share of the sync correlation biases
            # it): transform those frames again with the fine offset, or the residual leaks
            # between tones (once: the second pass is final). The other frames' steps repeat
            # with the same inputs, so their values do not change.
            eps = list(eps)
            for k in redo:
                eps[k] += offsets.eps_fine[k]
            again = np.empty((len(redo),) + spectra.shape[1:], np.complex64)
            spectra[redo] = self.sync.spectra(r, [starts[k] for k in redo],
                                              [eps[k] for k in redo], out=again)
            offsets = self._offsets(work, eps)  # ``work`` is ``spectra`` or a view of it
        return self._frames(r, found, starts, eps, work, offsets, lookup, demodulate)

    def _offsets(self, spectra: np.ndarray, eps: list[float]) -> "_Offsets":
        """Integer and fine offset, interferer-hit tones and the training and header rows.

        ``spectra`` has shape ([frames,] symbols, fft_size): without the frame axis for one
        frame, and so has every array this and :meth:`_frames` make per frame.
        """
        t = self.plan.train_symbols
        shift = self.sync.integer_shift(spectra)
        shifts = shift.tolist() if spectra.ndim == 3 else [int(shift)]
        # Per-symbol phase step from the identical training symbols (all offsets together).
        head = self._gather(spectra, slice(1, t + 2), 0, shifts)  # training rows, header
        if t == 2:
            step = np.conj(head[..., 0, :])
            step *= head[..., 1, :]
        else:
            step = np.add.reduce(np.conj(head[..., :t - 1, :]) * head[..., 1:t, :], axis=-2)
        # Tones a narrowband interferer dominates take no part: its own phase step would bias
        # the offset (and, through the time-domain correction, cost every tone some ICI).
        mag = np.abs(step)  # |H|^2 n per tone
        level = local_level(mag)
        hit = mag > 2.0 * level  # 3 dB above the local level
        step[hit] = 0.0
        total = np.add.reduce(step, axis=-1)  # the sum without its Python wrapper
        theta = np.arctan2(total.imag, total.real)  # np.angle without its wrapper
        if theta.ndim:
            eps_fine = [self.sync.fine_offset_tones(th, e, shift)
                        for th, e, shift in zip(theta.tolist(), eps, shifts)]
        else:
            eps_fine = [self.sync.fine_offset_tones(float(theta), eps[0], shifts[0])]
        return _Offsets(shifts, head, hit, level, theta, eps_fine)

    def _gather(self, spectra: np.ndarray, rows: slice, which: int,
                shifts: list[int]) -> np.ndarray:
        """``spectra[k, rows, bins]`` for every frame ``k`` (``spectra[rows, bins]`` without the
        frame axis), with the used (``which`` 0), pilot (1) or data (2) bins of each frame's
        integer offset.

        Gathers in mode "clip" (the bins are always in range, and the default mode checks
        every index and buffers an ``out``), each from a contiguous source: ``take`` copies a
        strided one first, and ``spectra[:, rows]`` of several frames is strided.
        """
        if spectra.ndim == 2:  # one frame without the frame axis: contiguous
            return spectra[rows].take(self._bins_for(shifts[0])[which], axis=1, mode="clip")
        part = spectra[:, rows]
        if len(shifts) == 1:  # one frame: contiguous
            return part.take(self._bins_for(shifts[0])[which], axis=2, mode="clip")
        out = np.empty(part.shape[:2] + (self._bins_for(shifts[0])[which].size,), np.complex64)
        for k, shift in enumerate(shifts):
            part[k].take(self._bins_for(shift)[which], axis=1, mode="clip", out=out[k])
        return out

    def _frames(self, r, found, starts, eps, spectra, offsets, lookup,
                demodulate) -> list[RxFrame]:
        """Everything after the offsets: phase, header, decisions, fit and SNR per frame."""
        plan, fmt = self.plan, self.format
        n, t = plan.fft_size, plan.train_symbols
        count = len(found)
        single = spectra.ndim == 2  # one frame, without the frame axis
        shifts, head, hit = offsets.shifts, offsets.head, offsets.hit
        phase = self.sync.symbol_phase(offsets.theta)
        head *= phase[..., 1:t + 2, None]
        h_train = (head[..., 0, :] + head[..., 1, :] if t == 2
                   else np.add.reduce(head[..., :t, :], axis=-2))
        h_train *= self._train_mean  # training sign / t
        # Header: maximal-ratio combining of the repeated BPSK bits, robust to a narrowband
        # interferer (which would otherwise outvote the good copies of its bit).
        soft_bits = self.header.soft(head, h_train, hit, offsets.level * (1.0 / n))
        header_bits = (soft_bits < 0).astype(np.uint8)
        headers = ([decode_header(header_bits)] if single
                   else [decode_header(bits) for bits in header_bits])
        oks = [headers[0][0]] if single else [ok for ok, _, _ in headers]
        # Data symbols: remove the residual phase drift measured on the pilots.
        y_pilot = self._gather(spectra, slice(t + 2, None), 1, shifts)
        row_phase = self.sync.row_phase(y_pilot, h_train.take(fmt.pilot_pos, axis=-1,
                                                              mode="clip"), phase)
        # Least squares over every symbol with known tone values: training, header, data.
        dp = fmt.data_pos
        rows = self._gather(spectra, slice(1, None), 2, shifts)  # ([frames,] rows, tones)
        rows *= row_phase[..., None]
        # Training rows preset; data rows are filled by decisions.
        x = self._x[0] if single else self._work_rows(count)
        if all(oks):  # the header row is known once its CRC passes
            x[..., t, :] = self.header.known_row(soft_bits)
        elif single:
            x[t] = 0.0
            rows[t] = 0.0  # an unknown header row takes no part
        else:
            header_ok = np.array(oks, bool)
            x[:, t] = 0.0
            if header_ok.any():
                x[header_ok, t] = self.header.known_row(soft_bits[header_ok])
            rows[~header_ok, t] = 0.0  # an unknown header row takes no part
        hit_data = hit.take(dp, axis=-1, mode="clip")
        # Frames fitted alike, in groups: one per map (data-aided), and the known-rows fits.
        if single:
            table_of = [self.maps.tables_for(headers[0][1] if oks[0] else None, lookup)]
        else:
            table_of = [self.maps.tables_for(seq if ok else None, lookup)
                        for ok, seq, _ in headers]
        keys = [("data", id(tables)) if tables is not None else (
            ("rows", ok) if t + ok < 3 else ("constant", ok))
            for tables, ok in zip(table_of, oks)]
        if single or keys.count(keys[0]) == count:  # one group: no lists
            groups = {keys[0]: range(count)}
        else:
            groups = {}
            for k, key in enumerate(keys):
                groups.setdefault(key, []).append(k)
        channel: list = [None] * count
        noise: list = [None] * count
        snr: list = [None] * count
        decided: list = [None] * count
        used: list = [0] * count
        for (kind, _), members in groups.items():
            whole = len(members) == count  # views, not copies, when every frame is alike
            if not whole:
                members = list(members)
            rows_g = rows if whole else rows[members]
            x_g = x if whole else x[members]
            hit_g = hit_data if whole else hit_data[members]
            known = t + int(oks[members[0]])
            if kind == "data":
                tables = table_of[members[0]]
                # Decide with the training channel; fit level and slope with those decisions
                # (the estimate); decide again with the leave-one-out channel (the data).
                h_data = (h_train if whole else h_train[members]).take(dp, axis=-1, mode="clip")
                decide(rows_g[..., t + 1:, :], h_data[..., None, :], tables,
                       points=x_g[..., t + 1:, :])
                h, h_rows, noise_var, pooled = self.fit.data_aided(
                    rows_g, x_g, known, tables.reliable_snr, hit_g, leave_one_out=demodulate)
                if demodulate:
                    idx = decide(rows_g[..., t + 1:, :], h_rows[..., t + 1:, :],
                                 tables).astype(np.uint8)
                    if single:
                        idx = idx[None]
                    for j, k in enumerate(members):
                        decided[k] = (idx[j, ..., 0], idx[j, ..., 1], tables.b_q)
                group_used = known + plan.data_symbols
            elif kind == "rows":
                # Training alone (the header failed): one degree of freedom per tone, S ~
                # sigma^2 Gamma(1), and 1/S has no finite mean (AWGN at 20 dB: +2.5 dB mean,
                # tones up to 46 dB high). The noise pooled over neighbouring tones has ~17
                # and is unbiased.
                h, noise_var = self.fit.known_rows(rows_g, x_g, known, hit_g)
                group_used = known
            else:
                h, noise_var = self.fit.known_constant(rows_g, x_g, known)
                group_used = known
            # The SNR in the type of each frame's noise (float64 where tones were pooled).
            if kind == "rows":
                parts = ((True, range(len(members))),)
            elif noise_var.dtype == np.float32:  # no tone pooled (the common case)
                parts = ((False, range(len(members))),)
            else:
                wide_of = pooled.reshape(-1).tolist()
                parts = tuple((wide, [j for j, w in enumerate(wide_of) if w == wide])
                              for wide in (False, True))
            for wide, part in parts:
                if not part:
                    continue
                every = len(part) == len(members)
                h_p = h if every else h[part]
                noise_p = noise_var if every else noise_var[part]
                if not wide and noise_p.dtype != np.float32:
                    noise_p = noise_p.astype(np.float32)  # float32 values, held as float64
                noise_p = np.maximum(noise_p, 1e-30)
                snr_db = squared_magnitude(h_p) / noise_p
                np.maximum(snr_db, 1e-30, out=snr_db)
                np.log10(snr_db, out=snr_db)
                snr_db *= 10.0
                if single:
                    channel[0], noise[0], snr[0], used[0] = h_p, noise_p, snr_db, group_used
                    continue
                for i, j in enumerate(part):
                    k = members[j]
                    channel[k], noise[k], snr[k] = h_p[i], noise_p[i], snr_db[i]
                    used[k] = group_used
        clipped = self._clipped(r, found, starts) if self.clip_level is not None else None
        out = []
        for k, (offset, point) in enumerate(found):
            ok, seq, counter = headers[k]
            start = point.start
            reason = "clipped" if clipped and clipped[k] else ("" if ok else "crc_failed")
            cfo_tones = eps[k] + shifts[k] + offsets.eps_fine[k]
            out.append(RxFrame(
                reason=reason, start=start, end=start + self.frame_span,
                sync_metric=point.metric, cfo_hz=cfo_tones * plan.tone_spacing_hz,
                header_ok=ok, map_seq=seq if ok else -1, counter=counter if ok else -1,
                map_known=table_of[k] is not None, channel=channel[k], noise_var=noise[k],
                snr_db=snr[k], decided=decided[k], symbols_used=used[k]))
        return out

    def _work_rows(self, count: int) -> np.ndarray:
        """The fit's row values for ``count`` frames: training rows preset, the rest free."""
        if self._x.shape[0] < count:
            x = np.empty((count,) + self._x.shape[1:], np.complex64)
            x[:, :self.plan.train_symbols] = self._train_data
            self._x = x
        return self._x[:count]

    def _clipped(self, r: np.ndarray, found, starts: list[int]) -> list[bool]:
        """Per frame, whether more than ``clip_fraction`` of its samples (from its cyclic
        prefix, within its block) have ``|I|`` or ``|Q|`` at or above the clip level."""
        if self.clip_level is None:
            return [False] * len(found)
        cp = self.plan.cp_len
        spans = [(max(d0 - cp, offset), d0 + self.frame_span)
                 for (offset, _), d0 in zip(found, starts)]
        lo, hi = spans[0][0], spans[-1][1]
        seg = r[lo:hi]
        at_level = np.abs(seg.real) >= self.clip_level
        at_level |= np.abs(seg.imag) >= self.clip_level
        return [np.count_nonzero(at_level[a - lo:b - lo]) > self.clip_fraction * (b - a)
                for a, b in spans]


class _Offsets(NamedTuple):
    """What :meth:`Receiver._offsets` finds per frame."""

    shifts: list  # integer offset (tones)
    head: np.ndarray  # training and header rows on the used tones, ([frames,] t + 1, used)
    hit: np.ndarray  # used tones a narrowband interferer hits
    level: np.ndarray  # local level of the phase step's magnitude
    theta: np.ndarray  # per-symbol phase step (radians)
    eps_fine: list  # offset left after the fraction and the integer part (tones)


class FrameScanner:
    """Finds successive frames in a stream of samples fed in pieces (recordings, radio buffers).

    Parameters
    ----------
    receiver : Receiver
        The receiver DSP.
    demodulate : bool
        Make the final data decisions too (not needed for estimates).
    batch_frames : int
        Most frames estimated in one pass (:meth:`Receiver.estimate`).

    Notes
    -----
    The search window is two frames long; without a frame it advances by one frame length, so
    every possible frame start is searched with the whole frame inside the window.

    Each :meth:`feed` first locates the frames of its samples one window after another (the
    next window starts where the last frame ended), then estimates them together, up to
    ``batch_frames`` at a time: a buffer of several frames pays the numpy calls of one frame
    (their fixed cost is most of a frame's time). The results equal those of
    :meth:`Receiver.receive` on each window, bit for bit; a frame that fails is flagged on its
    own. A larger batch saves little once the calls are shared, and its spectra outgrow the
    cache.
    """

    def __init__(self, receiver: Receiver, *, demodulate: bool = False,
                 batch_frames: int = 8) -> None:
        if batch_frames < 1:
            raise ValueError(f"batch_frames={batch_frames} must be >= 1")
        self.receiver = receiver
        self.demodulate = bool(demodulate)
        self.batch_frames = int(batch_frames)
        # Samples kept between feeds sit at the front of one array that grows as needed (a
        # fresh buffer per feed costs an allocation and its page faults).
        self._store = np.zeros(0, np.complex64)
        self._held = 0
        self._offset = 0  # absolute index of self._store[0]

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
        samples = np.asarray(samples, dtype=np.complex64).ravel()
        size = self._held + samples.size
        if self._store.size < size:
            store = np.empty(size + self.receiver.plan.frame_len, np.complex64)
            store[:self._held] = self._store[:self._held]
            self._store = store
        self._store[self._held:size] = samples
        buf = self._store[:size]
        receiver = self.receiver
        window = 2 * receiver.plan.frame_len
        pos, out = 0, []
        pending: list[tuple[int, int, SyncPoint]] = []  # (place in out, window, point)

        def flush() -> None:
            frames = receiver.estimate(buf, [(at, point) for _, at, point in pending], lookup,
                                       demodulate=self.demodulate)
            for (place, at, _), res in zip(pending, frames):
                out[place] = (self._offset + at + res.start, res)
            pending.clear()

        while buf.size - pos >= (window if not final else 1):
            res, point = receiver.locate(buf[pos:pos + window])
            if point is not None:
                pending.append((len(out), pos, point))
                out.append(None)  # filled in by flush()
                pos += point.start + receiver.frame_span
                if len(pending) >= self.batch_frames:
                    flush()
                continue
            at_end = pos + window >= buf.size
            if res.reason == "truncated" and not (final and at_end):
                if res.start < 0 or res.end <= 0:
                    break
                pos += res.end  # the frame starts later in the window: search again from there
                continue
            if res.start >= 0 or res.reason == "no_sync":  # a short noise tail is no loss
                out.append((self._offset + pos + max(res.start, 0), res))
            if final and at_end:
                pos = buf.size
                break
            pos += max(res.end, 1)
        if pending:
            flush()
        self._held = size - pos
        self._store[:self._held] = buf[pos:]  # numpy copies overlapping parts safely
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
