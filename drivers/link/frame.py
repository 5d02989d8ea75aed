"""OFDM tone plan, frame format and transmitter of brimline's link model.

The frame (all symbols carry a cyclic prefix of ``cp_len`` samples)::

    | sync | train x T | header | data x D |

* **sync**: QPSK on the even used tones only, so the symbol body is two identical halves of
  ``fft_size / 2`` samples (Schmidl-Cox timing and fractional frequency offset). Together with the
  first training symbol it forms a known differential pattern that resolves the integer (even)
  part of the frequency offset.
* **train**: ``T >= 2`` identical BPSK symbols on every used tone (data and pilot tones). They
  give a full-band least-squares channel estimate, a noise estimate from their differences and a
  fine frequency estimate from their phase advance.
* **header**: BPSK on every used tone: 64 bits (map sequence number, 32 bits, ``0xFFFFFFFF`` for
  the default map; frame counter, 16 bits; CRC-16, polynomial 0x1021, initial 0xFFFF, over those
  six bytes) repeated across the band, bit ``j`` of copy ``r`` on used tone ``64 r + j``, so each
  bit's copies lie far apart in frequency, and scrambled by a fixed BPSK pattern.
* **data**: the data tones carry Gray-mapped QAM per the load map (0 bits = tone off), scaled by
  ``sqrt(power_lin)``; the pilot tones carry known BPSK for common-phase tracking.
* **payload CRC**: the data symbols' bits, read as one stream (symbol by symbol, tone by tone in
  ascending order, each tone's value most significant bit first: :func:`payload_stream`), end in
  a CRC-32 over the bits before it (:func:`crc32`, the IEEE 802.3 CRC-32; the bits packed into
  bytes most significant bit first, the last byte padded with zeros), written most significant
  bit first. A map carrying at most 32 bits per frame carries no payload (no CRC either). The
  receiver checks it (:func:`payload_ok`), so a frame decoded with a wrong map or with bit
  errors is caught as a frame error.

Every pseudo-random pattern comes from one PRBS15 stream (x^15 + x^14 + 1), so a frame is fixed
by the plan alone. Scaling: the transmitter's IFFT is unitary, so a unit-power tone has power 1 in
the receiver's unitary FFT and additive noise of variance ``s2`` per complex sample gives a
per-tone SNR of ``1 / s2`` on a unit channel.

A plan's ``plan_id`` hashes the tone plan only (FFT size, prefix, sample rate, data and pilot
tones), not the frame layout, so maps stay valid when the training or data symbol count changes.
"""

from __future__ import annotations

import math
import zlib
from dataclasses import dataclass

import numpy as np

from brimline.daemon.records import LoadMap, TonePlan, frozen_array

__all__ = [
    "LinkPlan",
    "make_plan",
    "slot_samples",
    "check_link",
    "as_link_plan",
    "FrameFormat",
    "Transmitter",
    "TxFrame",
    "crc16",
    "crc32",
    "CRC_BITS",
    "payload_stream",
    "payload_values",
    "payload_ok",
    "payload_data_bits",
    "encode_header",
    "decode_header",
    "qam_points",
    "map_arrays",
    "bit_errors",
    "NO_MAP",
    "HEADER_BITS",
]

#: Header value meaning "the transmitter used its default map" (no published map yet).
NO_MAP = 0xFFFFFFFF
#: Header length in bits: 32-bit map sequence, 16-bit frame counter, 16-bit CRC.
HEADER_BITS = 64
#: Length of the payload CRC at the end of the data symbols' bits.
CRC_BITS = 32
_MAX_BITS = 12


@dataclass(frozen=True)
class LinkPlan(TonePlan):
    """A :class:`TonePlan` plus the frame layout that the transmitter and receiver share.

    Attributes (besides those of TonePlan)
    --------------------------------------
    train_symbols : int
        Identical full-band training symbols per frame (>= 2).
    data_symbols : int
        Data symbols per frame.
    max_bits : int
        Largest constellation the link supports, bits per tone.
    cfo_range_tones : int
        Largest frequency offset the receiver searches, in tone spacings.
    center_hz : float
        Radio centre frequency in hertz (NaN when not set).
    """

    train_symbols: int = 2
    data_symbols: int = 12
    max_bits: int = 10
    cfo_range_tones: int = 8
    center_hz: float = math.nan

    def __post_init__(self) -> None:
        super().__post_init__()
        for name, low in (("train_symbols", 2), ("data_symbols", 1), ("max_bits", 1),
                          ("cfo_range_tones", 0)):
            value = int(getattr(self, name))
            if value < low:
                raise ValueError(f"{name}={value} must be >= {low}")
            object.__setattr__(self, name, value)
        object.__setattr__(self, "center_hz", float(self.center_hz))

    @property
    def used_tones(self) -> np.ndarray:
        """Data and pilot tones together, ascending signed bins."""
        return np.union1d(self.data_tones, self.pilot_tones).astype(np.int16)

    @property
    def n_symbols(self) -> int:
        """OFDM symbols per frame (sync, training, header, data)."""
        return 2 + self.train_symbols + self.data_symbols

    @property
    def frame_len(self) -> int:
        """Samples per frame including every cyclic prefix."""
        return self.n_symbols * self.symbol_len

    @property
    def frame_duration_s(self) -> float:
        """Frame duration in seconds."""
        return self.frame_len / self.sample_rate_hz


def make_plan(*, fft_size: int = 256, cp_len: int = 32, sample_rate_hz: float = 3.84e6,
              used_tones_half: int = 100, pilot_spacing: int = 8, train_symbols: int = 2,
              data_symbols: int = 12, max_bits: int = 10, cfo_range_tones: int = 8,
              center_hz: float | None = None) -> LinkPlan:
    """Build the tone plan and frame layout from the ``link:`` section's keys.

    Parameters
    ----------
    fft_size : int
        FFT length (power of two, >= 128).
    cp_len : int
        Cyclic prefix in samples.
    sample_rate_hz : float
        Complex sample rate in hertz.
    used_tones_half : int
        Used tones on each side of DC: bins ``-U..-1`` and ``1..U`` (DC is always empty).
    pilot_spacing : int
        Every ``pilot_spacing``-th used tone on each side is a pilot, starting at the outermost.
    train_symbols, data_symbols, max_bits, cfo_range_tones : int
        Frame layout, see :class:`LinkPlan`.
    center_hz : float or None
        Radio centre frequency in hertz.

    Returns
    -------
    LinkPlan

    Raises
    ------
    ValueError
        For inconsistent values; the message names the key and its value.

    Examples
    --------
    >>> plan = make_plan(fft_size=256, used_tones_half=100, pilot_spacing=8)
    >>> plan.data_tones.size, plan.pilot_tones.size
    (174, 26)
    """
    values = dict(fft_size=fft_size, cp_len=cp_len, sample_rate_hz=sample_rate_hz,
                  used_tones_half=used_tones_half, pilot_spacing=pilot_spacing,
                  train_symbols=train_symbols, data_symbols=data_symbols, max_bits=max_bits,
                  cfo_range_tones=cfo_range_tones, center_hz=center_hz)
    for key, value in values.items():
        check_link(key, value, values)
    n, u = int(fft_size), int(used_tones_half)
    # Pilots from the outermost used tone inwards, mirrored, so channel edges are always pilots.
    positive = np.arange(1, u + 1)
    pilot_pos = positive[(u - positive) % pilot_spacing == 0]
    data_pos = np.setdiff1d(positive, pilot_pos)
    return LinkPlan(
        fft_size=n, cp_len=int(cp_len), sample_rate_hz=float(sample_rate_hz),
        data_tones=np.concatenate([-data_pos[::-1], data_pos]),
        pilot_tones=np.concatenate([-pilot_pos[::-1], pilot_pos]),
        train_symbols=int(train_symbols), data_symbols=int(data_symbols),
        max_bits=int(max_bits), cfo_range_tones=int(cfo_range_tones),
        center_hz=math.nan if center_hz is None else float(center_hz))


def check_link(key: str, value, others: dict) -> None:
    """Check one ``link:`` key against the keys it depends on (those before it in ``make_plan``).

    Raises
    ------
    ValueError
        Naming the key and its value, e.g. ``used_tones_half=200 must be in [32, 127]``.
    """
    n = int(others.get("fft_size", 256))
    u = int(others.get("used_tones_half", 100))
    if key == "fft_size" and (value < 128 or value & (value - 1)):
        raise ValueError(f"fft_size={value} must be a power of two >= 128")
    if key == "cp_len" and not 0 < value < n:
        raise ValueError(f"cp_len={value} must be in [1, fft_size={n})")
    if key == "sample_rate_hz" and not (math.isfinite(value) and value > 0):
        raise ValueError(f"sample_rate_hz={value} must be positive and finite")
    if key == "used_tones_half" and not HEADER_BITS // 2 <= value <= n // 2 - 1:
        raise ValueError(f"used_tones_half={value} must be in [{HEADER_BITS // 2}, "
                         f"fft_size/2 - 1 = {n // 2 - 1}] (the header needs {HEADER_BITS} "
                         f"used tones and DC stays empty)")
    if key == "pilot_spacing" and not 2 <= value <= u:
        raise ValueError(f"pilot_spacing={value} must be in [2, used_tones_half={u}] "
                         f"(pilots must lie inside the used tones)")
    if key == "train_symbols" and not 2 <= value <= 64:
        raise ValueError(f"train_symbols={value} must be in [2, 64]")
    if key == "data_symbols" and not 1 <= value <= 1024:
        raise ValueError(f"data_symbols={value} must be in [1, 1024]")
    if key == "max_bits" and not 1 <= value <= _MAX_BITS:
        raise ValueError(f"max_bits={value} must be in [1, {_MAX_BITS}]")
    if key == "cfo_range_tones" and not 0 <= value <= n // 4:
        raise ValueError(f"cfo_range_tones={value} must be in [0, fft_size/4 = {n // 4}]")
    if key == "center_hz" and value is not None and not (math.isfinite(value) and value > 0):
        raise ValueError(f"center_hz={value} must be positive and finite")


def as_link_plan(plan: TonePlan) -> LinkPlan:
    """Return ``plan`` as a :class:`LinkPlan`, giving a bare TonePlan the default frame layout."""
    if isinstance(plan, LinkPlan):
        return plan
    return LinkPlan(fft_size=plan.fft_size, cp_len=plan.cp_len,
                    sample_rate_hz=plan.sample_rate_hz, data_tones=plan.data_tones,
                    pilot_tones=plan.pilot_tones)


def slot_samples(plan: LinkPlan, frame_rate_hz: float, key: str = "frame_rate_hz") -> int:
    """Samples per frame slot (a frame and its silent gap) at ``frame_rate_hz``.

    Parameters
    ----------
    plan : LinkPlan
        Tone plan and frame layout (sample rate, frame length).
    frame_rate_hz : float
        Frame slots per second.
    key : str
        The config key that gave ``frame_rate_hz``, named in the error.

    Raises
    ------
    ValueError
        When a frame does not fit in one slot (the message names ``key``).
    """
    slot = int(round(plan.sample_rate_hz / float(frame_rate_hz)))
    if slot < plan.frame_len:
        raise ValueError(f"{key}={frame_rate_hz}: frames last "
                         f"{plan.frame_duration_s * 1e3:.3f} ms, so at most "
                         f"{1.0 / plan.frame_duration_s:.1f} frames per second fit")
    return slot


# --------------------------------------------------------------------------- sequences, CRC


def prbs15(n_bits: int) -> np.ndarray:
    """First ``n_bits`` of the PRBS15 sequence x^15 + x^14 + 1 (ITU-T O.150), all-ones seed."""
    state = 0x7FFF
    out = np.empty(n_bits, dtype=np.uint8)
    for i in range(n_bits):
        bit = ((state >> 14) ^ (state >> 13)) & 1
        state = ((state << 1) | bit) & 0x7FFF
        out[i] = bit
    return out


def _crc16_table() -> list[int]:
    table = []
    for byte in range(256):
        crc = byte << 8
        for _ in range(8):
            crc = ((crc << 1) ^ 0x1021) if crc & 0x8000 else (crc << 1)
        table.append(crc & 0xFFFF)
    return table


_CRC16_TABLE = _crc16_table()


def crc16(data: bytes) -> int:
    """CRC-16 with polynomial 0x1021, initial value 0xFFFF, no reflection, no final XOR.

    Examples
    --------
    >>> hex(crc16(b"123456789"))
    '0x29b1'
    """
    crc = 0xFFFF
    for byte in data:
        crc = ((crc << 8) & 0xFFFF) ^ _CRC16_TABLE[((crc >> 8) ^ byte) & 0xFF]
    return crc


def crc32(data: bytes) -> int:
    """The IEEE 802.3 CRC-32 of ``data``: polynomial 0x04C11DB7, reflected input and output,
    initial value and final XOR 0xFFFFFFFF (the standard library's ``zlib.crc32``).

    Examples
    --------
    >>> hex(crc32(b"123456789"))
    '0xcbf43926'
    """
    return zlib.crc32(data) & 0xFFFFFFFF


def _payload_layout(bits: np.ndarray):
    """Per data tone and bit position (tones, max bits): which positions carry a bit, and the
    shift of that bit in the tone's symbol value (most significant first)."""
    bits = np.asarray(bits, dtype=np.int64)
    k = np.arange(max(int(bits.max(initial=0)), 1))
    shift = bits[:, None] - 1 - k[None, :]
    return shift >= 0, np.maximum(shift, 0)


def payload_stream(values: np.ndarray, bits: np.ndarray) -> np.ndarray:
    """The data symbols' bits as one stream (uint8), in the order the payload CRC reads them.

    Parameters
    ----------
    values : ndarray of int, shape (data symbols, data tones)
        Symbol value per data symbol and tone.
    bits : ndarray of int, shape (data tones,)
        Bits per tone of the map the values were sent with.

    Returns
    -------
    ndarray of uint8, shape (data symbols * bits.sum(),)
        Symbol by symbol, tone by tone, each value most significant bit first.
    """
    present, shift = _payload_layout(bits)
    v = np.asarray(values, dtype=np.int64)
    grid = (v[:, :, None] >> shift[None]) & 1
    return grid[np.broadcast_to(present, grid.shape)].astype(np.uint8)


def payload_values(stream: np.ndarray, bits: np.ndarray, data_symbols: int) -> np.ndarray:
    """Symbol values (int64, shape (data symbols, data tones)) of a payload bit stream: the
    inverse of :func:`payload_stream`."""
    present, shift = _payload_layout(bits)
    grid = np.zeros((int(data_symbols), *present.shape), np.int64)
    grid[np.broadcast_to(present, grid.shape)] = np.asarray(stream, dtype=np.int64)
    return (grid << shift[None]).sum(axis=2) * present.any(axis=1)[None, :]


def payload_data_bits(bits: np.ndarray, data_symbols: int) -> int:
    """Data bits one frame delivers with a map of ``bits`` per tone: every payload bit but the
    CRC's (0 when the frame carries ``CRC_BITS`` bits or fewer: no payload then)."""
    total = int(np.asarray(bits, dtype=np.int64).sum()) * int(data_symbols)
    return total - CRC_BITS if total > CRC_BITS else 0


def _crc_bits(stream: np.ndarray) -> np.ndarray:
    word = crc32(np.packbits(stream).tobytes())
    return np.unpackbits(np.frombuffer(word.to_bytes(4, "big"), dtype=np.uint8))


def payload_ok(values: np.ndarray, bits: np.ndarray) -> bool:
    """Whether the payload CRC of decided symbol ``values`` sent with ``bits`` per tone passes
    (False for a map without payload: see :func:`payload_data_bits`)."""
    stream = payload_stream(values, bits)
    if stream.size <= CRC_BITS:
        return False
    return bool(np.array_equal(_crc_bits(stream[:-CRC_BITS]), stream[-CRC_BITS:]))


def encode_header(map_seq: int, counter: int) -> np.ndarray:
    """Header bits (uint8, length 64): map sequence (``NO_MAP`` for none), counter, CRC-16."""
    seq = NO_MAP if map_seq < 0 else int(map_seq) % NO_MAP
    body = seq.to_bytes(4, "big") + (int(counter) & 0xFFFF).to_bytes(2, "big")
    word = body + crc16(body).to_bytes(2, "big")
    return np.unpackbits(np.frombuffer(word, dtype=np.uint8))


def decode_header(bits: np.ndarray) -> tuple[bool, int, int]:
    """Return ``(crc_ok, map_seq, counter)`` from 64 header bits; ``map_seq`` is -1 for none."""
    word = np.packbits(np.asarray(bits, dtype=np.uint8)).tobytes()
    ok = crc16(word[:6]) == int.from_bytes(word[6:8], "big")
    seq = int.from_bytes(word[:4], "big")
    return ok, (-1 if seq == NO_MAP else seq), int.from_bytes(word[4:6], "big")


# --------------------------------------------------------------------------- constellations

#: Gray code of each PAM level index (per axis, up to 7 bits)
GRAY = np.arange(1 << (_MAX_BITS // 2 + 1)) ^ (np.arange(1 << (_MAX_BITS // 2 + 1)) >> 1)
GRAY_INV = np.argsort(GRAY)
_POPCOUNT = np.array([bin(v).count("1") for v in range(1 << _MAX_BITS)], dtype=np.int64)


def grid_axes(bits: np.ndarray):
    """The rectangular QAM grid of each tone's bit count (Gray PAM on each axis).

    Returns per tone (levels on I, levels on Q, bits on Q, amplitude scale for unit energy)."""
    bits = np.asarray(bits, dtype=np.int64)
    b_i, b_q = (bits + 1) // 2, bits // 2
    m_i, m_q = 1 << b_i, 1 << b_q
    energy = ((m_i * m_i - 1) + (m_q * m_q - 1)) / 3.0
    scale = np.divide(1.0, np.sqrt(energy), out=np.zeros(bits.shape), where=energy > 0)
    return m_i, m_q, b_q, scale


def qam_points(bits: int) -> np.ndarray:
    """Unit-average-energy Gray-mapped constellation for ``bits`` bits, indexed by symbol value.

    Even ``bits`` give square QAM, odd ``bits`` a rectangular ``2^((b+1)/2) x 2^((b-1)/2)`` grid
    (BPSK for 1 bit); each axis is Gray-coded PAM, so nearest neighbours differ in one bit.
    Value ``v`` puts its high ``ceil(b/2)`` bits on I and its low ``floor(b/2)`` bits on Q.
    """
    if not 0 <= bits <= _MAX_BITS:
        raise ValueError(f"bits={bits} must be in [0, {_MAX_BITS}]")
    values = np.arange(1 << bits)
    return _symbols(values, np.full(values.shape, bits))


def _symbols(values: np.ndarray, bits: np.ndarray) -> np.ndarray:
    """Constellation points for symbol ``values`` with per-element ``bits`` (broadcast)."""
    m_i, m_q, b_q, scale = grid_axes(bits)
    i_idx = GRAY_INV[values >> b_q]
    q_idx = GRAY_INV[values & (m_q - 1)]
    return scale * ((2 * i_idx - (m_i - 1)) + 1j * (2 * q_idx - (m_q - 1)))


def bit_errors(sent: np.ndarray, received: np.ndarray) -> int:
    """Number of differing bits between two arrays of symbol values."""
    return int(_POPCOUNT[np.bitwise_xor(np.asarray(sent), np.asarray(received))].sum())


def map_arrays(plan: TonePlan, load_map: LoadMap | None, default_bits: int):
    """``(map_seq, bits, power_lin)`` over the data tones for a map, or the default map.

    The default map (``load_map`` None, sequence -1) is ``default_bits`` on every data tone at
    nominal power.
    """
    n = plan.data_tones.size
    if load_map is None:
        return -1, np.full(n, int(default_bits), np.int64), np.ones(n)
    if load_map.tone_index.shape != plan.data_tones.shape or np.any(
            load_map.tone_index != plan.data_tones):
        raise ValueError(f"map seq={load_map.seq} does not cover the plan's data tones")
    return load_map.seq, load_map.bits.astype(np.int64), load_map.power_lin.astype(np.float64)


# --------------------------------------------------------------------------- frame format


class FrameFormat:
    """Every fixed table of a plan's frame, built once (sequences, bin indices, sync waveform).

    Parameters
    ----------
    plan : TonePlan
        A :class:`LinkPlan`; a bare TonePlan gets the default frame layout.
    """

    def __init__(self, plan: TonePlan) -> None:
        plan = as_link_plan(plan)
        self.plan = plan
        n = plan.fft_size
        used = plan.used_tones.astype(np.int64)
        self.used = used
        self.used_bins = used % n
        self.n_used = used.size
        self.data_pos = np.searchsorted(used, plan.data_tones.astype(np.int64))
        self.pilot_pos = np.searchsorted(used, plan.pilot_tones.astype(np.int64))
        self.even_pos = np.flatnonzero(used % 2 == 0)
        n_even, n_pilot = self.even_pos.size, self.pilot_pos.size
        bits = prbs15(2 * n_even + 2 * self.n_used + plan.data_symbols * n_pilot)
        cut = np.cumsum([2 * n_even, self.n_used, self.n_used])
        q = 1.0 - 2.0 * bits[:cut[0]].reshape(-1, 2)
        sync = np.zeros(self.n_used, np.complex128)
        sync[self.even_pos] = q[:, 0] + 1j * q[:, 1]  # |x|^2 = 2 keeps the symbol energy
        self.sync = sync
        self.train = 1.0 - 2.0 * bits[cut[0]:cut[1]]
        self.scramble = 1.0 - 2.0 * bits[cut[1]:cut[2]]
        self.pilots = (1.0 - 2.0 * bits[cut[2]:]).reshape(plan.data_symbols, n_pilot)
        self.header_reps = self.n_used // HEADER_BITS
        # conj(sync) * train on the even tones: the pattern that fixes the integer offset.
        self.differential = np.conj(sync[self.even_pos]) * self.train[self.even_pos]

    def header_symbol(self, header_bits: np.ndarray) -> np.ndarray:
        """Header tone values (BPSK) over the used tones."""
        signs = np.ones(self.n_used)
        reps = self.header_reps * HEADER_BITS
        signs[:reps] = 1.0 - 2.0 * np.tile(header_bits.astype(np.float64), self.header_reps)
        return signs * self.scramble

    def modulate(self, tones: np.ndarray) -> np.ndarray:
        """Time samples (complex64, with cyclic prefixes) of symbols given over the used tones.

        ``tones`` has shape (symbols, used tones); the IFFT is unitary.
        """
        n, cp = self.plan.fft_size, self.plan.cp_len
        grid = np.zeros((tones.shape[0], n), np.complex128)
        grid[:, self.used_bins] = tones
        body = np.fft.ifft(grid, axis=1) * math.sqrt(n)
        return np.concatenate([body[:, n - cp:], body], axis=1).astype(np.complex64).ravel()


@dataclass(frozen=True)
class TxFrame:
    """One transmitted frame.

    Attributes
    ----------
    samples : ndarray of complex64
        Baseband samples, cyclic prefixes included (``plan.frame_len``).
    values : ndarray of int64, shape (data_symbols, data tones)
        Symbol value sent on each data tone (0 where the tone carries 0 bits).
    bits, power_lin : ndarray
        The map applied: bits and linear power per data tone.
    map_seq : int
        Sequence number written into the header (-1 for the default map).
    counter : int
        Frame counter written into the header (16 bits).
    """

    samples: np.ndarray
    values: np.ndarray
    bits: np.ndarray
    power_lin: np.ndarray
    map_seq: int
    counter: int


class Transmitter:
    """Builds frames for a plan: ``tx.frame(bits=..., power_lin=..., ...)``.

    Parameters
    ----------
    plan : TonePlan
        The tone plan and frame layout.
    """

    def __init__(self, plan: TonePlan) -> None:
        self.format = FrameFormat(plan)
        self.plan = self.format.plan

    def frame(self, *, bits: np.ndarray, power_lin: np.ndarray, map_seq: int, counter: int,
              rng: np.random.Generator) -> TxFrame:
        """Build one frame with random payload from ``rng``.

        Parameters
        ----------
        bits : ndarray of int, (data tones,)
            Bits per data tone (0 .. plan.max_bits).
        power_lin : ndarray of float, (data tones,)
            Linear power per data tone relative to nominal.
        map_seq : int
            Map sequence number for the header (-1: default map).
        counter : int
            Frame counter for the header.
        rng : numpy.random.Generator
            Source of the payload bits.

        Returns
        -------
        TxFrame
        """
        fmt, plan = self.format, self.plan
        bits = np.asarray(bits, dtype=np.int64)
        power = np.asarray(power_lin, dtype=np.float64)
        if bits.shape != plan.data_tones.shape or power.shape != bits.shape:
            raise ValueError(f"bits and power_lin must have {plan.data_tones.size} data tones")
        if bits.min(initial=0) < 0 or bits.max(initial=0) > plan.max_bits:
            raise ValueError(f"bits must be in [0, max_bits={plan.max_bits}]")
        if not np.all(np.isfinite(power)) or power.min(initial=0.0) < 0:
            raise ValueError("power_lin must be finite and >= 0")
        d = plan.data_symbols
        values = rng.integers(0, 1 << bits, size=(d, bits.size))
        stream = payload_stream(values, bits)
        if stream.size > CRC_BITS:  # the payload ends in its CRC
            stream[-CRC_BITS:] = _crc_bits(stream[:-CRC_BITS])
            values = payload_values(stream, bits, d)
        tones = np.zeros((plan.n_symbols, fmt.n_used), np.complex128)
        tones[0] = fmt.sync
        tones[1:1 + plan.train_symbols] = fmt.train
        tones[1 + plan.train_symbols] = fmt.header_symbol(encode_header(map_seq, counter))
        data = tones[2 + plan.train_symbols:]
        data[:, fmt.data_pos] = _symbols(values, bits) * np.sqrt(np.where(bits > 0, power, 0.0))
        data[:, fmt.pilot_pos] = fmt.pilots
        return TxFrame(samples=fmt.modulate(tones), values=values,
                       bits=frozen_array(bits, np.int64, "bits"),
                       power_lin=frozen_array(power, np.float64, "power_lin"),
                       map_seq=int(map_seq), counter=int(counter) & 0xFFFF)
