"""SigMF IQ recordings through the ``sigmf`` package: reading, writing, capture segments.

A SigMF recording is a JSON metadata file ``NAME.sigmf-meta`` next to the raw samples
``NAME.sigmf-data`` (SigMF specification 1.x, https://sigmf.org). brimline reads and writes
datatypes ``cf32_le`` (complex float32) and ``ci16_le`` (complex int16, full scale 32768 = 1.0,
the scale the SigMF library gives fixed-point data).

Reading (:func:`read_sigmf`)
----------------------------
The metadata is read with a size bound and checked field by field first, so that a malformed file
is answered in one line naming the file and the field; then the ``sigmf`` package validates the
whole metadata against the specification's JSON schema (``sigmf.SigMFFile.validate``), and checks
``core:sha512`` when the metadata carries one (``sigmf.hashing``). The samples are memory-mapped
(``np.memmap``), never read whole.

- errors (:class:`~brimline.daemon.errors.SourceError`): unreadable or non-JSON meta; ``global``
  not an object; ``core:version`` not a string or of another major version than 1; a datatype
  other than the two above; ``core:sample_rate`` not a positive finite number; more than one
  channel; ``captures`` not a list of objects; a capture's ``core:sample_start`` not a
  non-negative integer, or at or past the end of the data; a ``core:frequency`` or
  ``core:global_index`` that is not a finite number or count; header or trailing bytes
  (non-conforming datasets); a data file that is missing, a folder, empty, or not a whole number
  of samples; data whose values betray the other datatype (see below); a ``core:sha512`` that
  the data does not match.
- warnings (``Recording.warnings``, logged by the IQ driver and under ``run --check``): no
  ``core:version``; a capture without ``core:sample_start`` or out of order; ``annotations`` that
  are not a list of objects; data shorter than its annotations; a tone-plan extension that cannot
  be read; and, when none of these was found, whatever the SigMF library's schema validation
  refuses (the checks above name a problem more precisely than the schema does, so the library's
  finding is not repeated for a problem they already reported).

Datatype mix-ups: a file's size is checked to be a whole number of samples (8 bytes for cf32, 4
for ci16). float32 data labelled ci16 always passes that test (8 is a multiple of 4), so the
values are checked: read as int16 pairs, float32 samples put the float's upper half (sign,
exponent, top of the mantissa) in every Q value and its random lower half in every I value, so
Q stays inside a narrow band of magnitudes while I spreads over the whole range; no recording of
a real signal looks like that. int16 data labelled cf32 puts each Q value in a float's sign and
exponent, so every negative Q reads as a float of 1e10 to 1e38 or NaN: cf32 values that are not
finite or beyond 1e9 are refused. Both tests read the first 65536 samples only. Not detected:
int16 data whose Q values are all positive, labelled cf32 (it reads as tiny floats; the
receiver then finds no frames, which the run's ``no_sync`` counter shows), and ci16 data of
one byte order labelled the other (``_be`` types are not read at all).

Writing (:class:`CaptureWriter`, :func:`write_sigmf`)
-----------------------------------------------------
:class:`CaptureWriter` appends samples to the data file as they come and writes the metadata at
:meth:`~CaptureWriter.close`, with the data's ``core:sha512`` computed then (by the ``sigmf``
package's hashing), after the library has validated it. A new capture segment starts at every
gap, overflow or retune (:meth:`~CaptureWriter.gap`, :meth:`~CaptureWriter.overflow`,
:meth:`~CaptureWriter.retune`); every segment restates its fields (``core:frequency``,
``core:global_index``, ``core:datetime`` when given) instead of inheriting them, as the
specification asks, and says why it began in ``brimline:segment``.

The project extension
---------------------
Namespace ``brimline`` (declared in ``core:extensions``, optional, version
:data:`EXTENSION_VERSION`). Global ``brimline:tone_plan``: the OFDM tone plan the recording was
made with, ``{"fft_size", "cp_len", "data_tones", "pilot_tones", "plan_id"}`` plus the frame
layout (``train_symbols``, ``data_symbols``, ``max_bits``) when the plan has one. Per capture:
``brimline:segment`` (``start``, ``gap``, ``overflow`` or ``retune``) and, for a gap or an
overflow whose size is known, ``brimline:lost_samples``.
"""

from __future__ import annotations

import json
import math
import os
import threading
import warnings
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

import jsonschema
import numpy as np
import sigmf
from sigmf import hashing as sigmf_hashing

from brimline.daemon.errors import RecordingError, SourceError
from brimline.daemon.records import TonePlan

__all__ = [
    "CI16_FULL_SCALE",
    "SIGMF_VERSION",
    "EXTENSION",
    "EXTENSION_VERSION",
    "SEGMENT_REASONS",
    "Recording",
    "Segment",
    "CaptureWriter",
    "read_sigmf",
    "write_sigmf",
    "library_findings",
    "tone_plan_fields",
]

#: ci16 integer value that stands for amplitude 1.0: 2**15, as the SigMF library scales
#: fixed-point samples (sigmf-python, sigmf/sigmffile.py, ``SigMFFile._read_datafile``:
#: ``data *= 2 ** -(component_size * 8 - 1)``); the largest positive value is 32767/32768.
CI16_FULL_SCALE = 32768.0
_CI16_MAX = 32767
_DTYPES = {"cf32_le": np.dtype("<c8"), "ci16_le": np.dtype("<i2")}
_SAMPLE_BYTES = {"cf32_le": 8, "ci16_le": 4}
#: SigMF specification version written (the one the installed ``sigmf`` package implements).
SIGMF_VERSION = sigmf.__specification__
#: Project extension namespace (declared in ``core:extensions`` of every capture written).
EXTENSION = "brimline"
EXTENSION_VERSION = "1.0.0"
#: Why a capture segment began.
SEGMENT_REASONS = ("start", "gap", "overflow", "retune")
_PLAUSIBILITY_SAMPLES = 65536
#: Largest meta file read (a meta with thousands of annotations is a few MB).
_MAX_META_BYTES = 64 << 20
#: Largest |I| or |Q| accepted in cf32 data: far above full scale (1.0) and above any ADC's raw
#: counts (a 24-bit converter reaches 8.4e6); int16 pairs read as float32 reach 1e38.
_CF32_PLAUSIBLE_MAX = 1e9
_PLAN_KEY = f"{EXTENSION}:tone_plan"
_SEGMENT_KEY = f"{EXTENSION}:segment"
_LOST_KEY = f"{EXTENSION}:lost_samples"
_LAYOUT_KEYS = ("train_symbols", "data_symbols", "max_bits")


def _paths(path: str | Path) -> tuple[Path, Path]:
    p = Path(path)
    if p.is_dir() or p.name in ("", ".", ".."):
        raise SourceError(f"{p}: is a folder; give a recording as NAME, NAME.sigmf-meta or "
                          f"NAME.sigmf-data")
    if p.suffix in (".sigmf-meta", ".sigmf-data"):
        p = p.with_suffix("")
    return p.with_name(p.name + ".sigmf-meta"), p.with_name(p.name + ".sigmf-data")


@dataclass(frozen=True)
class Segment:
    """One capture segment of a recording.

    Attributes
    ----------
    sample_start : int
        First sample of the segment in the data file.
    sample_count : int
        Samples in the segment (up to the next segment or the end of the data).
    global_index : int
        Index of ``sample_start`` in the original sample stream (``core:global_index``; equal to
        ``sample_start`` when absent): the samples lost before this segment are
        ``global_index - sample_start`` minus those lost before earlier segments.
    center_hz : float
        ``core:frequency`` of the segment (NaN when absent).
    reason : str
        ``brimline:segment`` (``start``, ``gap``, ``overflow``, ``retune``), or ``""`` for a
        segment written by another program.
    """

    sample_start: int
    sample_count: int
    global_index: int
    center_hz: float
    reason: str = ""


@dataclass(frozen=True)
class Recording:
    """A SigMF recording opened for reading.

    Attributes
    ----------
    meta_path, data_path : Path
        The two files.
    datatype : str
        ``cf32_le`` or ``ci16_le``.
    sample_rate_hz : float
        ``core:sample_rate``.
    center_hz : float
        ``core:frequency`` of the first capture (NaN when absent).
    n_samples : int
        Complex samples in the data file.
    raw : ndarray
        Memory map of the data file (complex64, or int16 pairs for ci16).
    warnings : tuple of str
        Problems where reading on is safe, one line each naming the file and the field.
    segments : tuple of Segment
        The capture segments in order (one covering the whole data when the meta lists none
        usable).
    tone_plan : TonePlan or None
        The tone plan of the ``brimline:tone_plan`` extension (None when absent or unreadable).
    plan_id : str or None
        The extension's ``plan_id`` as written (None when absent).
    """

    meta_path: Path
    data_path: Path
    datatype: str
    sample_rate_hz: float
    center_hz: float
    n_samples: int
    raw: np.ndarray
    warnings: tuple[str, ...] = ()
    segments: tuple[Segment, ...] = ()
    tone_plan: TonePlan | None = None
    plan_id: str | None = None

    def samples(self, start: int, stop: int) -> np.ndarray:
        """Samples ``start:stop`` as complex64 (ci16 scaled so 32768 is 1.0)."""
        if self.datatype == "ci16_le":
            pairs = np.asarray(self.raw[2 * start:2 * stop], dtype=np.float32)
            return (pairs[0::2] + 1j * pairs[1::2]).astype(np.complex64) / CI16_FULL_SCALE
        return np.asarray(self.raw[start:stop], dtype=np.complex64)


def _is_int(v: Any) -> bool:
    return isinstance(v, int) and not isinstance(v, bool)


def _is_number(v: Any) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v)


def _read_meta(meta_path: Path) -> dict:
    try:
        with open(meta_path, "rb") as f:  # bounded: a device or a huge file is not a meta file
            blob = f.read(_MAX_META_BYTES + 1)
        if len(blob) > _MAX_META_BYTES:
            raise SourceError(f"{meta_path}: larger than {_MAX_META_BYTES} bytes; not a SigMF "
                              f"metadata file")
        meta = json.loads(blob.decode("utf-8"))
    except FileNotFoundError:
        raise SourceError(f"{meta_path}: no such SigMF metadata file") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise SourceError(f"{meta_path}: cannot read: {exc}") from exc
    except json.JSONDecodeError as exc:
        raise SourceError(f"{meta_path} line {exc.lineno}: not valid JSON: {exc.msg}") from exc
    except ValueError as exc:  # an integer of thousands of digits
        raise SourceError(f"{meta_path}: not valid JSON: {exc}") from exc
    except RecursionError:  # JSON nested thousands deep
        raise SourceError(f"{meta_path}: JSON nested too deeply") from None
    if not isinstance(meta, dict) or not isinstance(meta.get("global"), dict):
        raise SourceError(f"{meta_path}: no 'global' object")
    return meta


def _check_global(meta_path: Path, glob: dict, warnings_: list[str]) -> tuple[str, float]:
    """Version, datatype, sample rate and channels of the ``global`` object."""
    version = glob.get("core:version")
    if version is None:
        warnings_.append(f"{meta_path}: global has no core:version (SigMF requires it); "
                         f"read as {SIGMF_VERSION}")
    elif not isinstance(version, str) or version.split(".")[0] != "1":
        raise SourceError(f"{meta_path}: core:version={version!r} must be a SigMF 1.x version "
                          f"string such as {SIGMF_VERSION!r}")
    datatype = glob.get("core:datatype")
    if datatype not in _DTYPES:
        raise SourceError(f"{meta_path}: core:datatype={datatype!r} is not one of "
                          f"{sorted(_DTYPES)}")
    rate = glob.get("core:sample_rate")
    if not (_is_number(rate) and rate > 0):
        raise SourceError(f"{meta_path}: core:sample_rate={rate!r} must be a positive number")
    channels = glob.get("core:num_channels", 1)
    if channels != 1 or not _is_int(channels):
        raise SourceError(f"{meta_path}: core:num_channels={channels!r}: only single-channel "
                          f"recordings are read")
    trailing = glob.get("core:trailing_bytes", 0)
    if trailing != 0:
        raise SourceError(f"{meta_path}: core:trailing_bytes={trailing!r}: non-conforming "
                          f"datasets are not read")
    return datatype, float(rate)


def _object_list(meta_path: Path, meta: dict, key: str) -> list[dict]:
    """``meta[key]`` as a list of objects (absent: empty); raises naming the key otherwise."""
    items = meta.get(key, [])
    if not isinstance(items, list):
        raise SourceError(f"{meta_path}: {key} must be a list of objects, got "
                          f"{type(items).__name__}")
    for i, item in enumerate(items):
        if not isinstance(item, dict):
            raise SourceError(f"{meta_path}: {key}[{i}] must be an object, got "
                              f"{type(item).__name__}")
    return items


def _check_captures(meta_path: Path, captures: list[dict], warnings_: list[str]) -> float:
    """Field types of every capture; returns the first capture's ``core:frequency`` (or NaN)."""
    previous = -1
    for i, cap in enumerate(captures):
        start = cap.get("core:sample_start")
        if start is None:
            warnings_.append(f"{meta_path}: captures[{i}] has no core:sample_start "
                             f"(SigMF requires it)")
        elif not (_is_int(start) and start >= 0):
            raise SourceError(f"{meta_path}: captures[{i}].core:sample_start={start!r} must be "
                              f"an integer >= 0")
        elif start < previous:
            warnings_.append(f"{meta_path}: captures[{i}].core:sample_start={start} comes before "
                             f"the previous capture's {previous} (SigMF orders them)")
        else:
            previous = start
        freq = cap.get("core:frequency")
        if freq is not None and not _is_number(freq):
            raise SourceError(f"{meta_path}: captures[{i}].core:frequency={freq!r} must be a "
                              f"number of Hz")
        index = cap.get("core:global_index")
        if index is not None and not (_is_int(index) and index >= 0):
            raise SourceError(f"{meta_path}: captures[{i}].core:global_index={index!r} must be "
                              f"an integer >= 0")
        header = cap.get("core:header_bytes", 0)
        if header != 0:
            raise SourceError(f"{meta_path}: captures[{i}].core:header_bytes={header!r}: "
                              f"non-conforming datasets are not read")
    if captures and captures[0].get("core:frequency") is not None:
        return float(captures[0]["core:frequency"])
    return math.nan


def _check_extent(meta_path: Path, data_path: Path, meta: dict, captures: list[dict], n: int,
                  warnings_: list[str]) -> None:
    """Captures inside the data (error) and annotations inside the data (warning)."""
    for i, cap in enumerate(captures):
        start = cap.get("core:sample_start")
        if start is not None and start >= n:
            raise SourceError(f"{meta_path}: captures[{i}].core:sample_start={start} is past the "
                              f"end of the data ({n} samples in {data_path.name})")
    try:
        annotations = _object_list(meta_path, meta, "annotations")
    except SourceError as exc:  # annotations only label the data; playing on is safe
        warnings_.append(f"{exc}; annotations ignored")
        return
    end = 0
    for i, ann in enumerate(annotations):
        start, count = ann.get("core:sample_start", 0), ann.get("core:sample_count", 0)
        if not (_is_int(start) and _is_int(count) and start >= 0 and count >= 0):
            warnings_.append(f"{meta_path}: annotations[{i}] core:sample_start={start!r}, "
                             f"core:sample_count={count!r} are not counts of samples; ignored")
            continue
        end = max(end, start + count)
    if end > n:
        warnings_.append(f"{meta_path}: annotations reach sample {end} but {data_path.name} "
                         f"holds {n} samples (data shorter than its annotations)")


def _check_values(meta_path: Path, datatype: str, raw: np.ndarray) -> None:
    """Refuse data whose first samples betray the other datatype (see the module docstring)."""
    if datatype == "cf32_le":
        head = np.asarray(raw[:_PLAUSIBILITY_SAMPLES]).view(np.float32)
        with np.errstate(invalid="ignore"):
            bad = np.count_nonzero(~(np.abs(head) <= _CF32_PLAUSIBLE_MAX))  # NaN counts too
        if bad:
            raise SourceError(f"{meta_path}: core:datatype='cf32_le' but {bad} of the first "
                              f"{head.size} I and Q values are NaN, infinite or beyond "
                              f"{_CF32_PLAUSIBLE_MAX:g}: damaged data, or int16 samples?")
        return
    pairs = np.asarray(raw[:2 * _PLAUSIBILITY_SAMPLES]).reshape(-1, 2).astype(np.int32)
    pairs = pairs[np.any(pairs != 0, axis=1)]  # zeros are zeros in either datatype
    if pairs.shape[0] < 256:
        return
    i_mag, q_mag = np.abs(pairs[:, 0]), np.abs(pairs[:, 1])
    # Upper halves of float32 values between 2**-16 and 16 in magnitude: |int16| 14208..18560.
    q_in_band = np.mean((q_mag >= 14000) & (q_mag <= 18700))
    i_spread = np.mean(i_mag > 20000)  # a uniform lower half lands here with probability 0.39
    q_spread = np.mean(q_mag > 20000)
    if q_in_band > 0.95 and q_spread < 0.01 and i_spread > 0.25:
        raise SourceError(f"{meta_path}: core:datatype='ci16_le' but the data looks like "
                          f"float32 (every Q value is a float's upper half); is it cf32_le?")


def library_findings(meta: dict) -> list[str]:
    """What the ``sigmf`` package's own validation says about a metadata object.

    Runs ``sigmf.SigMFFile(metadata=meta).validate()`` (the specification's JSON schema, the
    ordering of captures and annotations, and declared extension namespaces).

    Parameters
    ----------
    meta : dict
        The parsed ``.sigmf-meta`` content.

    Returns
    -------
    list of str
        One line per finding (an empty list: the metadata validates).
    """
    found: list[str] = []
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            sigmf.SigMFFile(metadata=meta).validate()
        except jsonschema.exceptions.ValidationError as exc:
            where = ".".join(str(p) for p in exc.absolute_path)
            found.append(f"{where + ': ' if where else ''}{exc.message}")
        except (sigmf.error.SigMFError, KeyError, TypeError, AttributeError) as exc:
            found.append(f"{type(exc).__name__}: {exc}")
    found.extend(str(w.message) for w in caught)
    return [" ".join(text.split()) for text in found]  # one line each


def _extension(meta_path: Path, glob: dict, sample_rate_hz: float,
               warnings_: list[str]) -> tuple[TonePlan | None, str | None]:
    """The ``brimline:tone_plan`` extension as a TonePlan (None, None when absent)."""
    fields = glob.get(_PLAN_KEY)
    if fields is None:
        return None, None
    try:
        plan = TonePlan(fft_size=fields["fft_size"], cp_len=fields["cp_len"],
                        sample_rate_hz=sample_rate_hz,
                        data_tones=np.asarray(fields["data_tones"], dtype=np.int64),
                        pilot_tones=np.asarray(fields["pilot_tones"], dtype=np.int64))
        plan_id = fields.get("plan_id")
        return plan, plan_id if isinstance(plan_id, str) else None
    except (KeyError, TypeError, ValueError, OverflowError) as exc:
        warnings_.append(f"{meta_path}: global {_PLAN_KEY} cannot be read ({exc}); tone plan "
                         f"of the recording unknown")
        return None, None


def _segments(captures: list[dict], n: int) -> tuple[Segment, ...]:
    """Capture segments in order; one over the whole data when none is usable."""
    usable = sorted((c for c in captures if _is_int(c.get("core:sample_start"))),
                    key=lambda c: c["core:sample_start"])
    if not usable or usable[0]["core:sample_start"] != 0:
        usable = [{"core:sample_start": 0}, *usable]
    out = []
    for i, cap in enumerate(usable):
        start = cap["core:sample_start"]
        stop = usable[i + 1]["core:sample_start"] if i + 1 < len(usable) else n
        if stop <= start:
            continue  # two captures at one index: the later one describes the samples
        freq = cap.get("core:frequency")
        index = cap.get("core:global_index")
        reason = cap.get(_SEGMENT_KEY)
        out.append(Segment(sample_start=start, sample_count=stop - start,
                           global_index=index if _is_int(index) else start,
                           center_hz=float(freq) if _is_number(freq) else math.nan,
                           reason=reason if isinstance(reason, str) else ""))
    return tuple(out)


def read_sigmf(path: str | Path, *, verify_checksum: bool = True) -> Recording:
    """Open a SigMF recording (``NAME``, ``NAME.sigmf-meta`` or ``NAME.sigmf-data``).

    Parameters
    ----------
    path : str or Path
        The recording.
    verify_checksum : bool
        Check the data against ``core:sha512`` when the metadata has one (reads the whole
        data file once).

    Returns
    -------
    Recording
        With ``warnings`` for problems where reading on is safe; the samples memory-mapped.

    Raises
    ------
    SourceError
        A missing or unreadable file, bad JSON, a missing or malformed field, an unsupported
        datatype, data that does not fit the meta or its checksum; the message names the file
        and the field (the module docstring lists every check).
    """
    meta_path, data_path = _paths(path)
    found: list[str] = []
    meta = _read_meta(meta_path)
    glob = meta["global"]
    datatype, rate = _check_global(meta_path, glob, found)
    captures = _object_list(meta_path, meta, "captures")
    center = _check_captures(meta_path, captures, found)
    if data_path.is_dir():
        raise SourceError(f"{data_path}: is a folder, not a SigMF data file")
    try:
        size = data_path.stat().st_size
    except FileNotFoundError:
        raise SourceError(f"{data_path}: no such SigMF data file") from None
    except OSError as exc:
        raise SourceError(f"{data_path}: cannot read: {exc}") from exc
    item = _SAMPLE_BYTES[datatype]
    if size == 0:
        raise SourceError(f"{data_path}: is empty (no samples)")
    if size % item:
        raise SourceError(f"{data_path}: {size} bytes is not a whole number of {datatype} "
                          f"samples ({item} bytes each); is core:datatype right?")
    n = size // item
    _check_extent(meta_path, data_path, meta, captures, n, found)
    try:
        raw = np.memmap(data_path, dtype=_DTYPES[datatype], mode="r")
    except (OSError, ValueError) as exc:
        raise SourceError(f"{data_path}: cannot map: {exc}") from exc
    _check_values(meta_path, datatype, raw)
    expected = glob.get("core:sha512")
    if verify_checksum and isinstance(expected, str):
        try:
            actual = sigmf_hashing.calculate_sha512(filename=data_path)
        except OSError as exc:
            raise SourceError(f"{data_path}: cannot read: {exc}") from exc
        if actual != expected.lower():
            raise SourceError(f"{meta_path}: core:sha512 does not match {data_path.name} "
                              f"(damaged or replaced data)")
    plan, plan_id = _extension(meta_path, glob, rate, found)
    if not found:  # the hand checks above say it more precisely when they found something
        found.extend(f"{meta_path}: SigMF validation: {text}" for text in library_findings(meta))
    return Recording(meta_path, data_path, datatype, rate, center, n, raw, tuple(found),
                     _segments(captures, n), plan, plan_id)


def tone_plan_fields(plan: TonePlan) -> dict:
    """The ``brimline:tone_plan`` extension object of ``plan`` (JSON-ready).

    The frame layout (``train_symbols``, ``data_symbols``, ``max_bits``) is included when the
    plan carries one (a link plan does).
    """
    fields: dict[str, Any] = {
        "fft_size": int(plan.fft_size), "cp_len": int(plan.cp_len),
        "data_tones": [int(t) for t in plan.data_tones],
        "pilot_tones": [int(t) for t in plan.pilot_tones],
        "plan_id": plan.plan_id,
    }
    for key in _LAYOUT_KEYS:
        value = getattr(plan, key, None)
        if value is not None:
            fields[key] = int(value)
    return fields


def _utc(datetime_s: float) -> str:
    """Seconds since the Unix epoch as SigMF's ``core:datetime`` (RFC 3339, ``Z``)."""
    stamp = datetime.fromtimestamp(datetime_s, tz=timezone.utc)
    return stamp.strftime("%Y-%m-%dT%H:%M:%S.%f") + "Z"


class CaptureWriter:
    """A SigMF recording written while samples arrive; metadata and checksum at close.

    Parameters
    ----------
    path : str or Path
        ``NAME``, ``NAME.sigmf-meta`` or ``NAME.sigmf-data``.
    sample_rate_hz : float
        ``core:sample_rate``.
    datatype : str
        ``cf32_le`` or ``ci16_le`` (``round(x * 32768)``, saturating at -32768 and +32767,
        which is how a receiver's ADC clips).
    center_hz : float or None
        ``core:frequency`` of the first segment (restated in every later one until a retune).
    plan : TonePlan or None
        Written to the ``brimline:tone_plan`` extension.
    description : str
        ``core:description``.
    overwrite : bool
        Replace an existing recording of that name (otherwise refused).
    datetime_s : float or None
        Wall time of the first sample (seconds since the Unix epoch) for ``core:datetime``;
        later segments get it from their ``core:global_index`` unless given their own.

    Raises
    ------
    RecordingError
        The recording exists (and ``overwrite`` is false) or cannot be created.
    ValueError
        ``datatype`` or ``sample_rate_hz`` is not valid.

    Notes
    -----
    Thread-safe: the driver thread writes while another thread may close. :meth:`close` is
    idempotent; writing after it raises ``RuntimeError``. A source reports a discontinuity with
    :meth:`gap` (samples lost between buffers), :meth:`overflow` (the device dropped samples)
    or :meth:`retune` (a new centre frequency); each starts a new capture segment at the next
    sample written.
    """

    def __init__(self, path: str | Path, *, sample_rate_hz: float, datatype: str = "cf32_le",
                 center_hz: float | None = None, plan: TonePlan | None = None,
                 description: str = "", overwrite: bool = False,
                 datetime_s: float | None = None) -> None:
        if datatype not in _DTYPES:
            raise ValueError(f"datatype={datatype!r} is not one of {sorted(_DTYPES)}")
        if not (_is_number(sample_rate_hz) and sample_rate_hz > 0):
            raise ValueError(f"sample_rate_hz={sample_rate_hz!r} must be a positive number")
        self.meta_path, self.data_path = _paths(path)
        self.datatype = datatype
        self.sample_rate_hz = float(sample_rate_hz)
        self._center_hz = None if center_hz is None else float(center_hz)
        self._plan = plan
        self._description = description
        self._lock = threading.Lock()
        self._closed = False
        self.n_samples = 0
        self._lost = 0
        self._start_datetime_s = None if datetime_s is None else float(datetime_s)
        self._segments: list[dict] = []
        self._open_segment("start", None, datetime_s)
        if not overwrite and (self.meta_path.exists() or self.data_path.exists()):
            raise RecordingError(f"{self.data_path}: exists already; IQ captures are never "
                                 f"overwritten")
        try:
            self.data_path.parent.mkdir(parents=True, exist_ok=True)
            self._file = open(self.data_path, "wb")
        except OSError as exc:
            raise RecordingError(f"{self.data_path}: cannot create IQ capture: {exc}") from exc

    # ------------------------------------------------------------------ segments

    def _open_segment(self, reason: str, lost: int | None, datetime_s: float | None) -> None:
        if lost:
            self._lost += int(lost)
        seg: dict[str, Any] = {"core:sample_start": self.n_samples,
                               "core:global_index": self.n_samples + self._lost,
                               _SEGMENT_KEY: reason}
        if self._center_hz is not None:
            seg["core:frequency"] = self._center_hz
        if lost is not None:
            seg[_LOST_KEY] = int(lost)
        if datetime_s is None and self._start_datetime_s is not None:
            # restated from the start time and the original stream's sample count
            datetime_s = self._start_datetime_s + seg["core:global_index"] / self.sample_rate_hz
        if datetime_s is not None:
            seg["core:datetime"] = _utc(float(datetime_s))
        if self._segments and self._segments[-1]["core:sample_start"] == self.n_samples:
            self._segments[-1] = seg  # nothing was written in the previous one: replace it
        else:
            self._segments.append(seg)

    def _discontinuity(self, reason: str, lost: int | None, datetime_s: float | None) -> None:
        if lost is not None and (not _is_int(lost) or lost < 0):
            raise ValueError(f"lost_samples={lost!r} must be an integer >= 0")
        with self._lock:
            self._check_open()
            self._open_segment(reason, lost, datetime_s)

    def gap(self, lost_samples: int | None = None, *, datetime_s: float | None = None) -> None:
        """Samples were lost between two buffers: the next sample starts a new segment."""
        self._discontinuity("gap", lost_samples, datetime_s)

    def overflow(self, lost_samples: int | None = None, *,
                 datetime_s: float | None = None) -> None:
        """The device reported an overflow: the next sample starts a new segment."""
        self._discontinuity("overflow", lost_samples, datetime_s)

    def retune(self, center_hz: float, *, datetime_s: float | None = None) -> None:
        """The radio moved to ``center_hz``: the next sample starts a new segment."""
        if not _is_number(center_hz):
            raise ValueError(f"center_hz={center_hz!r} must be a finite number of Hz")
        with self._lock:
            self._check_open()
            self._center_hz = float(center_hz)
            self._open_segment("retune", None, datetime_s)

    @property
    def segments(self) -> list[dict]:
        """Copies of the capture segments so far (SigMF capture objects)."""
        with self._lock:
            return [dict(s) for s in self._segments]

    @property
    def closed(self) -> bool:
        """True once :meth:`close` has run."""
        return self._closed

    # ------------------------------------------------------------------ samples

    def _check_open(self) -> None:
        if self._closed:
            raise RuntimeError(f"{self.data_path}: IQ capture is closed")

    def _encode(self, samples: np.ndarray) -> bytes:
        x = np.asarray(samples).ravel()
        if self.datatype == "ci16_le":
            pairs = np.empty(2 * x.size, np.float64)
            pairs[0::2], pairs[1::2] = x.real, x.imag
            raw = np.clip(np.rint(pairs * CI16_FULL_SCALE), -_CI16_MAX - 1, _CI16_MAX)
            return raw.astype("<i2").tobytes()
        return x.astype("<c8").tobytes()

    def write(self, samples: np.ndarray) -> None:
        """Append complex samples to the current segment.

        Raises
        ------
        RecordingError
            The data file cannot be written (disk full, ...).
        RuntimeError
            After :meth:`close`.
        """
        blob = self._encode(samples)
        with self._lock:
            self._check_open()
            try:
                self._file.write(blob)
            except OSError as exc:
                raise RecordingError(f"{self.data_path}: cannot write IQ capture: {exc}") from exc
            self.n_samples += len(blob) // _SAMPLE_BYTES[self.datatype]

    # ------------------------------------------------------------------ close

    def _metadata(self, sha512: str) -> dict:
        glob: dict[str, Any] = {
            "core:datatype": self.datatype, "core:sample_rate": self.sample_rate_hz,
            "core:version": SIGMF_VERSION, "core:num_channels": 1,
            "core:description": self._description, "core:recorder": "brimline",
            "core:sha512": sha512,
            "core:extensions": [{"name": EXTENSION, "version": EXTENSION_VERSION,
                                 "optional": True}],
        }
        if self._plan is not None:
            glob[_PLAN_KEY] = tone_plan_fields(self._plan)
        captures = self._segments
        if captures[-1]["core:sample_start"] >= self.n_samples and len(captures) > 1:
            captures = captures[:-1]  # a discontinuity after the last sample: nothing follows
        handle = sigmf.SigMFFile(metadata={"global": glob, "captures": [dict(c) for c in captures],
                                           "annotations": []})
        handle.validate()  # the library's own check of what we are about to write
        return json.loads(handle.dumps())

    def close(self) -> tuple[Path, Path]:
        """Finish the data file, compute its checksum and write the metadata. Idempotent.

        Returns
        -------
        tuple of Path
            ``(meta_path, data_path)``.

        Raises
        ------
        RecordingError
            The data or metadata cannot be written (the data file stays; the metadata is
            written to a temporary name and renamed, so it is never half written).
        """
        with self._lock:
            if self._closed:
                return self.meta_path, self.data_path
            self._closed = True
            try:
                self._file.close()
                meta = self._metadata(sigmf_hashing.calculate_sha512(filename=self.data_path))
                tmp = self.meta_path.with_name(self.meta_path.name + ".tmp")
                with open(tmp, "w", encoding="utf-8") as f:
                    json.dump(meta, f, indent=2)
                    f.write("\n")
                os.replace(tmp, self.meta_path)
            except OSError as exc:
                raise RecordingError(f"{self.meta_path}: cannot finish IQ capture: {exc}") from exc
        return self.meta_path, self.data_path

    def abandon(self) -> None:
        """Close without metadata and delete the data file if no sample was written; else
        :meth:`close`. For a start that failed before any sample came."""
        with self._lock:
            if not (self._closed or self.n_samples):
                self._closed = True
                self._file.close()
                self.data_path.unlink(missing_ok=True)
                return
        self.close()

    def __enter__(self) -> "CaptureWriter":
        return self

    def __exit__(self, *exc) -> None:
        self.close()


def write_sigmf(path: str | Path, samples: np.ndarray, *, sample_rate_hz: float,
                center_hz: float | None = None, datatype: str = "cf32_le",
                description: str = "", plan: TonePlan | None = None) -> tuple[Path, Path]:
    """Write complex samples as a SigMF recording (replacing one of that name).

    One segment, the checksum and, with ``plan``, the tone-plan extension; see
    :class:`CaptureWriter`. ``ci16_le`` stores ``round(x * 32768)``, saturating at -32768 and
    +32767; :func:`read_sigmf` and the SigMF library read it back as ``value / 32768``.

    Returns
    -------
    tuple of Path
        ``(meta_path, data_path)``.

    Raises
    ------
    RecordingError
        The files cannot be written.
    """
    with CaptureWriter(path, sample_rate_hz=sample_rate_hz, datatype=datatype,
                       center_hz=center_hz, plan=plan, description=description,
                       overwrite=True) as writer:
        writer.write(samples)
    return writer.meta_path, writer.data_path
