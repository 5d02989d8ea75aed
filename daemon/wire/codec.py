"""The one codec: how a record becomes bytes, on the wire, in recordings and in the state file.

A message is a list of byte frames (a ZeroMQ multipart message)::

    [topic, header, array part 0, array part 1, ...]

``topic``
    ASCII name of the stream ("map", "heartbeat", "snapshot", "status", "ack", "estimate",
    "decision", ...). No topic is a prefix of another, so ZeroMQ's prefix subscriptions select
    exactly one stream each.
``header``
    UTF-8 JSON object (no NaN or Infinity tokens)::

        {"v": 1, "type": "load_map", "fields": {...}, "arrays": [{"name": "bits",
         "dtype": "|u1", "shape": [48]}, ...], "crc32": 1234567}

    ``v`` is :data:`PROTOCOL_VERSION`; ``type`` names the record (:func:`record_types`, or
    ``"dict"`` for a plain mapping); ``fields`` holds the scalar fields; ``arrays`` lists the array
    parts in the order they follow; ``crc32`` is CRC-32 over the array parts concatenated.
    Non-finite floats in ``fields`` are written as the strings ``"inf"``, ``"-inf"``, ``"nan"``;
    a record's float field reads them back as floats, a plain dict keeps them as those strings.
``array parts``
    The raw bytes of C-contiguous little-endian arrays (numpy ``dtype.str`` spelling: ``"<f4"``,
    ``"<i2"``, ``"|u1"``, ``"<c8"``, ...), one part per entry of ``arrays``.

No pickles: decoding never runs code chosen by the sender. Every decoding problem raises
:class:`~brimline.daemon.errors.ProtocolError` naming what is wrong.

Why CRC-32 (zlib, the ISO-HDLC / IEEE 802.3 polynomial): the check guards against accidental
corruption and sender bugs (a wrong stride or byte order), not against tampering, which CURVE
encryption covers. CRC-32 is in the standard library of every language a transmitter is likely
to be written in, runs at several GB/s, and detects every burst error up to 32 bits. A
cryptographic hash (BLAKE2b) would add cost and a dependency for followers in C, for no gain
against that threat. The header itself is protected by its JSON syntax and the field checks
here; recordings add a CRC over the whole record (:mod:`brimline.daemon.wire.recording`).
"""

from __future__ import annotations

import dataclasses
import enum
import json
import math
import zlib
from typing import Any, Iterable, Mapping, Sequence

import numpy as np

from brimline.daemon.errors import ProtocolError
from brimline.daemon.records import Estimate, FrameOutcome, LoadMap, TonePlan

__all__ = [
    "PROTOCOL_VERSION",
    "TOPIC_MAP",
    "TOPIC_HEARTBEAT",
    "TOPIC_SNAPSHOT",
    "TOPIC_STATUS",
    "TOPIC_ACK",
    "TOPIC_ESTIMATE",
    "TOPIC_DECISION",
    "TOPIC_OUTCOME",
    "SNAPSHOT_REQUEST",
    "encode",
    "decode",
    "register_record",
    "record_types",
    "type_name",
    "byte_view",
    "MAX_DIMS",
    "MAX_PARTS",
    "max_frame_bytes",
]

#: Version written into every header; a decoder refuses any other.
PROTOCOL_VERSION = 1

TOPIC_MAP = "map"  #: LoadMap updates (PUB)
TOPIC_HEARTBEAT = "heartbeat"  #: liveness with the current epoch and seq (PUB)
TOPIC_SNAPSHOT = "snapshot"  #: reply to a snapshot request (ROUTER)
TOPIC_STATUS = "status"  #: operators' periodic status (status PUB)
TOPIC_ACK = "ack"  #: transmitter acknowledgements (PUSH -> PULL)
TOPIC_ESTIMATE = "estimate"  #: channel estimates (inproc hand-off, recordings)
TOPIC_DECISION = "decision"  #: change-control decisions (status PUB, recordings)
TOPIC_OUTCOME = "outcome"  #: frame outcomes from the receiver side (PUSH -> PULL, outer loop)

#: The single frame a client sends (after the empty delimiter) to ask for the current map.
SNAPSHOT_REQUEST = b"snapshot"

_DICT = "dict"
_ALLOWED_DTYPES = frozenset(
    ["|b1", "|u1", "|i1", "<u2", "<i2", "<u4", "<i4", "<u8", "<i8",
     "<f4", "<f8", "<c8", "<c16"])
_SCALAR_KINDS = ("int", "float", "str", "bool")
# Decoded JSON values whose type already is the scalar kind (exact types: bool is no int).
_SAME_TYPE = {int: "int", float: "float", str: "str", bool: "bool"}
_NON_FINITE_TEXT = frozenset(("inf", "-inf", "nan"))  # how non-finite floats are written
_MAX_HEADER_BYTES = 1 << 20
_MAX_TOPIC_BYTES = 64
_INT_MIN, _INT_MAX = -(1 << 63), (1 << 63) - 1

#: Most array dimensions a decoder accepts (numpy's own limit is 64; records use 1).
MAX_DIMS = 8
#: Most frames in one message: topic, header and up to 30 array parts (records carry <= 4).
MAX_PARTS = 32


@dataclasses.dataclass(frozen=True)
class _Schema:
    name: str
    cls: type
    scalars: dict[str, str]  # field -> "int" | "float" | "str" | "bool"
    arrays: dict[str, str]  # field -> dtype string, in field order
    finite: frozenset[str]
    required: frozenset[str]
    required_scalars: frozenset[str]  # required fields that travel in the header's fields


_BY_NAME: dict[str, _Schema] = {}
_BY_CLASS: dict[type, _Schema] = {}


def register_record(name: str, cls: type, *, arrays: Mapping[str, str],
                    finite: Iterable[str] = ()) -> None:
    """Teach the codec a frozen dataclass record type.

    Parameters
    ----------
    name : str
        The ``type`` written in headers (stable wire name, e.g. ``"load_map"``).
    cls : type
        A dataclass whose fields are ``int``, ``float``, ``str``, ``bool`` or ndarray.
    arrays : mapping of str to str
        Array field name -> little-endian dtype string the record documents (``"<f4"``).
    finite : iterable of str
        Fields (scalar or array) that must be finite; a decoded record violating it is refused.

    Raises
    ------
    TypeError
        When a field has a type the codec cannot carry, or a dtype is not allowed.
    """
    scalars: dict[str, str] = {}
    required = set()
    for f in dataclasses.fields(cls):
        if f.default is dataclasses.MISSING and f.default_factory is dataclasses.MISSING:
            required.add(f.name)
        if f.name in arrays:
            if arrays[f.name] not in _ALLOWED_DTYPES:
                raise TypeError(f"{cls.__name__}.{f.name}: dtype {arrays[f.name]!r} not allowed")
            continue
        kind = f.type if isinstance(f.type, str) else getattr(f.type, "__name__", str(f.type))
        if kind not in _SCALAR_KINDS:
            raise TypeError(f"{cls.__name__}.{f.name}: type {kind!r} cannot be encoded")
        scalars[f.name] = kind
    unknown = (set(arrays) | set(finite)) - {f.name for f in dataclasses.fields(cls)}
    if unknown:
        raise TypeError(f"{cls.__name__} has no fields {sorted(unknown)}")
    order = [f.name for f in dataclasses.fields(cls) if f.name in arrays]
    schema = _Schema(name, cls, scalars, {k: arrays[k] for k in order}, frozenset(finite),
                     frozenset(required), frozenset(required - set(arrays)))
    _BY_NAME[name] = schema
    _BY_CLASS[cls] = schema


register_record("load_map", LoadMap,
                arrays={"tone_index": "<i2", "bits": "|u1", "power_lin": "<f4"},
                finite=("created_s", "gap_db", "power_lin"))
register_record("estimate", Estimate,
                arrays={"tone_index": "<i2", "channel": "<c8", "noise_var": "<f4",
                        "snr_db": "<f4"},
                finite=("time_s",))
register_record("frame_outcome", FrameOutcome, arrays={}, finite=("time_s",))
register_record("tone_plan", TonePlan,
                arrays={"data_tones": "<i2", "pilot_tones": "<i2", "null_tones": "<i2"},
                finite=("sample_rate_hz",))


def record_types() -> dict[str, type]:
    """Wire type names the codec knows, with their record classes (``"dict"`` excluded)."""
    return {name: s.cls for name, s in _BY_NAME.items()}


def type_name(record: Any) -> str:
    """Wire type name of ``record`` (``"dict"`` for a mapping)."""
    if isinstance(record, Mapping):
        return _DICT
    schema = _BY_CLASS.get(type(record))
    if schema is None:
        raise TypeError(f"codec cannot encode a {type(record).__name__}")
    return schema.name


# --------------------------------------------------------------------------- encode


def _le_part(value: Any, dtype: str | None, name: str) -> tuple[memoryview, dict]:
    arr = np.asarray(value)
    if dtype is None:  # dict payload: keep the array's own dtype, in little-endian spelling
        dt = arr.dtype.newbyteorder("<") if arr.dtype.byteorder not in "|" else arr.dtype
        dtype = dt.str
        if dtype not in _ALLOWED_DTYPES:
            raise TypeError(f"{name}: dtype {arr.dtype} cannot be encoded")
    arr = np.asarray(arr, dtype=np.dtype(dtype), order="C")  # keeps 0-d shapes
    view = memoryview(arr.reshape(-1).view(np.uint8))
    return view, {"name": name, "dtype": dtype, "shape": list(arr.shape)}


def _json_scalar(value: Any, where: str) -> Any:
    """A JSON-ready value: numpy scalars unboxed, non-finite floats as strings."""
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        v = float(value)
        if math.isfinite(v):
            return v
        return "nan" if math.isnan(v) else ("inf" if v > 0 else "-inf")
    if isinstance(value, enum.Enum):  # DecisionKind and friends travel as their value
        return _json_scalar(value.value, where)
    if value is None:
        return None
    if isinstance(value, str):
        return str(value)
    if isinstance(value, Mapping):
        out = {}
        for k, v in value.items():
            if not isinstance(k, str):
                raise TypeError(f"{where}: key {k!r} is not a string")
            out[k] = _json_scalar(v, f"{where}.{k}")
        return out
    if isinstance(value, np.ndarray):
        return [_json_scalar(v, where) for v in value.tolist()]
    if isinstance(value, (list, tuple)):
        return [_json_scalar(v, f"{where}[{i}]") for i, v in enumerate(value)]
    raise TypeError(f"{where}: a {type(value).__name__} cannot be encoded")


def encode(topic: str, record: Any) -> list[bytes | memoryview]:
    """Encode ``record`` as a multipart message on ``topic``.

    Parameters
    ----------
    topic : str
        ASCII stream name, e.g. :data:`TOPIC_MAP`.
    record : LoadMap, Estimate, TonePlan, a registered record, or a mapping
        A mapping is a plain JSON message (status, heartbeat): its top-level ndarray values
        travel as array parts, everything else as JSON.

    Returns
    -------
    list of bytes-like
        ``[topic, header, *array_parts]``; array parts are zero-copy memoryviews of contiguous
        little-endian arrays (give them to ``send_multipart`` or ``file.write`` as they are).

    Raises
    ------
    TypeError
        When the record or a value in it cannot be encoded (a bug in the caller).
    ValueError
        When a field the record type requires finite is not (e.g. NaN in ``power_lin``).
    """
    if not topic or not topic.isascii():
        raise TypeError(f"topic {topic!r} must be a non-empty ASCII string")
    parts: list[memoryview] = []
    specs: list[dict] = []
    if isinstance(record, Mapping):
        kind = _DICT
        fields = {}
        for key, value in record.items():
            if not isinstance(key, str):
                raise TypeError(f"{topic}: key {key!r} is not a string")
            if isinstance(value, np.ndarray):
                view, spec = _le_part(value, None, key)
                parts.append(view)
                specs.append(spec)
            else:
                fields[key] = _json_scalar(value, f"{topic}.{key}")
    else:
        schema = _BY_CLASS.get(type(record))
        if schema is None:
            raise TypeError(f"codec cannot encode a {type(record).__name__}")
        kind = schema.name
        for name in schema.finite:  # refuse to send what every decoder would refuse
            v = getattr(record, name)
            if not (math.isfinite(v) if isinstance(v, float) else np.isfinite(v).all()):
                raise ValueError(f"{kind}.{name} must be finite to be encoded")
        fields = {name: _json_scalar(getattr(record, name), f"{kind}.{name}")
                  for name in schema.scalars}
        for name, dtype in schema.arrays.items():
            view, spec = _le_part(getattr(record, name), dtype, name)
            parts.append(view)
            specs.append(spec)
    crc = 0
    for part in parts:
        crc = zlib.crc32(part, crc)
    header = {"v": PROTOCOL_VERSION, "type": kind, "fields": fields, "arrays": specs,
              "crc32": crc}
    head = json.dumps(header, separators=(",", ":"), allow_nan=False).encode("utf-8")
    return [topic.encode("ascii"), head, *parts]


# --------------------------------------------------------------------------- decode


def max_frame_bytes(tones: int = 0) -> int:
    """The largest frame a receiving socket should accept (its ``zmq.MAXMSGSIZE``).

    A legitimate frame is either a header, which the decoder refuses above 1 MiB anyway, or an
    array part of at most one complex64 (8 bytes) per tone; twice that leaves room for any
    record a later version adds. ZeroMQ checks the limit per frame, against the size the
    frame announces, and disconnects a peer that exceeds it before buffering the frame.

    Parameters
    ----------
    tones : int
        Tones of the plan the socket carries maps or estimates for (0 when it carries none).

    Returns
    -------
    int
        Bytes; never below the 1 MiB header limit.
    """
    return max(_MAX_HEADER_BYTES, 16 * int(tones))


def byte_view(frame: Any) -> memoryview:
    """A flat byte view of a frame given as bytes, memoryview, zmq.Frame or ndarray.

    Raises
    ------
    ProtocolError
        When ``frame`` does not expose a buffer.
    """
    buf = getattr(frame, "buffer", frame)  # zmq.Frame exposes .buffer
    try:
        view = memoryview(buf)
    except TypeError:
        raise ProtocolError(f"frame of type {type(frame).__name__} is not bytes",
                            reason="parts") from None
    if view.format == "B" and view.ndim == 1:
        return view
    try:
        return view.cast("B")
    except TypeError:  # formats memoryview cannot cast (complex, non-contiguous): copy
        return memoryview(view.tobytes())


def _float(value: Any, where: str) -> float:
    if isinstance(value, bool):
        raise ProtocolError(f"{where}={value!r} is not a number", reason="field")
    if isinstance(value, (int, float)):
        try:
            return float(value)
        except OverflowError:  # a JSON integer beyond the float range
            raise ProtocolError(f"{where} is too large for a float", reason="field") from None
    if value in ("inf", "-inf", "nan"):
        return float(value)
    raise ProtocolError(f"{where}={_short(value)} is not a number", reason="field")


def _short(value: Any) -> str:
    """``repr(value)`` cut to 60 characters, so an error message stays one short line."""
    text = repr(value)
    return text if len(text) <= 60 else text[:57] + "..."


def _is_int(value: Any) -> bool:
    return isinstance(value, int) and not isinstance(value, bool)


def _scalar(kind: str, value: Any, where: str) -> Any:
    if kind == "float":
        return _float(value, where)
    if kind == "int":
        if not _is_int(value):
            raise ProtocolError(f"{where}={_short(value)} is not an integer", reason="field")
        if not _INT_MIN <= value <= _INT_MAX:
            raise ProtocolError(f"{where} is outside the 64-bit integer range", reason="field")
        return value
    if kind == "bool":
        if not isinstance(value, bool):
            raise ProtocolError(f"{where}={_short(value)} is not a boolean", reason="field")
        return value
    if not isinstance(value, str):
        raise ProtocolError(f"{where}={_short(value)} is not a string", reason="field")
    return value


#: The last array layout of each record type that passed every check: ``type`` -> (the specs
#: as decoded, one ``(name, dtype text, dtype, shape, bytes, shape text)`` per part). A stream
#: of one record type repeats one layout, so each message costs a comparison and a size check
#: per part instead of the checks of every spec. The comparison is exact for JSON values: the
#: lists of dicts must be equal, which fixes the keys, the names and dtypes (a string equals
#: only a string), and every size must be an ``int`` (equality alone would let ``200.0`` or
#: ``True`` stand for a checked ``200`` or ``1``). One entry per registered type: a peer that
#: varies layouts only makes itself the full checks.
_LAYOUTS: dict[str, tuple[list, tuple[tuple[str, str, np.dtype, tuple, int, str], ...]]] = {}


def _same_specs(specs: list, known: list) -> bool:
    """Whether ``specs`` (decoded JSON) is the layout ``known`` (checked before), exactly."""
    if specs != known:
        return False
    for spec in specs:
        for n in spec["shape"]:
            if type(n) is not int:
                return False
    return True


def _arrays(kind: str, specs: list, parts: Sequence[memoryview],
            expected: Mapping[str, str] | None) -> dict[str, np.ndarray]:
    if expected is not None:
        cached = _LAYOUTS.get(kind)
        if cached is not None and _same_specs(specs, cached[0]):
            return _known_arrays(kind, cached[1], parts)
    out: dict[str, np.ndarray] = {}
    checked = []
    for i, (spec, part) in enumerate(zip(specs, parts)):
        if not isinstance(spec, dict) or set(spec) != {"name", "dtype", "shape"}:
            raise ProtocolError(f"{kind}: array spec {i} must have exactly name, dtype, shape",
                                reason="arrays")
        name, dtype, shape = spec["name"], spec["dtype"], spec["shape"]
        if not isinstance(name, str) or name in out or not name.isprintable():
            raise ProtocolError(f"{kind}: array spec {i} has a bad or repeated name "
                                f"{_short(name)}", reason="arrays")
        if not isinstance(dtype, str) or dtype not in _ALLOWED_DTYPES:
            raise ProtocolError(f"{kind}.{name}: dtype {_short(dtype)} is not allowed",
                                reason="dtype")
        if expected is not None:
            if name not in expected:
                raise ProtocolError(f"{kind}: unknown array {name!r}", reason="arrays")
            if dtype != expected[name]:
                raise ProtocolError(f"{kind}.{name}: dtype {dtype!r}, expected "
                                    f"{expected[name]!r}", reason="dtype")
        if (not isinstance(shape, list) or len(shape) > MAX_DIMS
                or not all(_is_int(n) and n >= 0 for n in shape)):
            raise ProtocolError(f"{kind}.{name}: shape {_short(shape)} is not a list of sizes "
                                f"(at most {MAX_DIMS} of them)", reason="shape")
        dt = np.dtype(dtype)
        # Exact integer arithmetic: a dimension of 10**30 gives a number, not an overflow.
        want = math.prod(shape) * dt.itemsize
        entry = (name, dtype, dt, tuple(shape), want, _short(shape))
        out[name] = _part_array(kind, entry, part)
        checked.append(entry)
    if expected is not None and set(out) != set(expected):
        raise ProtocolError(f"{kind}: missing arrays {sorted(set(expected) - set(out))}",
                            reason="arrays")
    if expected is not None:
        # a deep copy of the decoded specs (lists and dicts of str and int): the caller's
        # header is never kept or shared
        known = [{"name": sp["name"], "dtype": sp["dtype"], "shape": list(sp["shape"])}
                 for sp in specs]
        _LAYOUTS[kind] = (known, tuple(checked))
    return out


def _known_arrays(kind: str, layout: tuple, parts: Sequence[memoryview]
                  ) -> dict[str, np.ndarray]:
    """``_arrays`` for a layout that passed every check before: only the part sizes are
    left to check (same messages)."""
    return {entry[0]: _part_array(kind, entry, part) for entry, part in zip(layout, parts)}


def _part_array(kind: str, entry: tuple, part: memoryview) -> np.ndarray:
    """One array part as described by a checked layout entry ``(name, dtype, dt, shape,
    bytes, shape text)``: its size checked, viewed without a copy, in native byte order."""
    name, dtype, dt, shape, want, shape_text = entry
    if part.nbytes != want:
        raise ProtocolError(f"{kind}.{name}: shape {shape_text} of {dtype} needs "
                            f"{_short(want)} bytes, part has {part.nbytes}", reason="size")
    arr = np.frombuffer(part, dtype=dt)   # 1-D, of exactly the size a 1-D shape names
    if len(shape) != 1:
        arr = arr.reshape(shape)
    if not dt.isnative:  # "<" on a big-endian host (allowed dtypes are "<" or "|")
        arr = arr.astype(dt.newbyteorder("="))
    return arr


def _refuse_constant(token: str) -> Any:
    raise ValueError(f"{token} is not JSON")


def _finite_float(text: str) -> float:
    value = float(text)
    if not math.isfinite(value):  # 1e400 would read as inf
        raise ValueError(f"number {text[:40]} is out of range")
    return value


#: The header parser, made once (``json.loads`` with hooks would build one per message). It
#: keeps no state between calls that matters: its key memo only shares equal key strings.
_JSON = json.JSONDecoder(parse_constant=_refuse_constant, parse_float=_finite_float)


def _header(topic: str, view: memoryview) -> dict:
    if view.nbytes > _MAX_HEADER_BYTES:
        raise ProtocolError(f"{topic}: header of {view.nbytes} bytes is too large",
                            reason="header_size")
    try:
        text = str(view, "utf-8")
        if text.startswith("\ufeff"):  # as json.loads: a byte order mark is no JSON
            raise json.JSONDecodeError("Unexpected UTF-8 BOM (decode using utf-8-sig)",
                                       text, 0)
        header = _JSON.decode(text)
    except (UnicodeDecodeError, ValueError, RecursionError) as exc:  # nesting bombs too
        raise ProtocolError(f"{topic}: header is not JSON: {_short(str(exc))}",
                            reason="header_json") from None
    if not isinstance(header, dict):
        raise ProtocolError(f"{topic}: header is not a JSON object", reason="header")
    missing = {"v", "type", "fields", "arrays", "crc32"} - set(header)
    if missing:
        raise ProtocolError(f"{topic}: header lacks {sorted(missing)}", reason="header")
    v = header["v"]
    if not _is_int(v) or v != PROTOCOL_VERSION:
        raise ProtocolError(f"{topic}: protocol version {_short(v)}, this decoder reads "
                            f"{PROTOCOL_VERSION}", reason="version")
    return header


def decode(frames: Sequence[Any], *, types: Iterable[str] | None = None) -> tuple[str, Any]:
    """Decode a multipart message made by :func:`encode`.

    Parameters
    ----------
    frames : sequence of bytes, memoryview or zmq.Frame
        ``[topic, header, *array_parts]``.
    types : iterable of str, optional
        Record type names this caller accepts (``{"dict"}`` for a socket that only carries
        plain messages); any other type is refused before a record is built. None accepts
        every registered type.

    Returns
    -------
    topic : str
    record : LoadMap, Estimate, TonePlan, a registered record, or dict
        Arrays in a decoded dict are read-only.

    Raises
    ------
    ProtocolError
        For every malformed input, and only this exception: wrong part count, a non-ASCII
        topic, a header that is not JSON (or nests too deep, or holds NaN tokens) or lacks
        keys, another protocol version, an unknown or unwanted record type, an unknown,
        missing or mistyped field, an integer outside 64 bits, a dtype, shape (more than
        :data:`MAX_DIMS` dimensions, negative or fractional sizes) or size that does not
        match its part, a CRC mismatch, a non-finite value where the record type forbids
        it, or field values the record itself refuses. ``exc.reason`` is a short key for
        counting.
    """
    if not isinstance(frames, (list, tuple)):
        frames = list(frames)
    if len(frames) < 2:
        raise ProtocolError(f"message has {len(frames)} parts, needs at least topic and header",
                            reason="parts")
    if len(frames) > MAX_PARTS:
        raise ProtocolError(f"message has {len(frames)} parts, at most {MAX_PARTS} allowed",
                            reason="parts")
    views = [memoryview(f) if type(f) is bytes else byte_view(f) for f in frames]
    if views[0].nbytes > _MAX_TOPIC_BYTES:
        raise ProtocolError(f"topic of {views[0].nbytes} bytes is too long", reason="topic")
    try:
        topic = bytes(views[0]).decode("ascii")
    except UnicodeDecodeError:
        raise ProtocolError("topic is not ASCII", reason="topic") from None
    if not topic:
        raise ProtocolError("topic is empty", reason="topic")
    if not topic.isprintable() or " " in topic:  # no control characters in log lines
        raise ProtocolError(f"topic {topic!r} is not a printable name", reason="topic")
    header = _header(topic, views[1])
    kind = header["type"]
    if not isinstance(kind, str) or (kind != _DICT and kind not in _BY_NAME):
        raise ProtocolError(f"{topic}: unknown record type {_short(kind)}", reason="type")
    if types is not None and kind not in types:
        raise ProtocolError(f"{topic}: a {kind!r} is not expected here", reason="type")
    fields = header["fields"]
    if not isinstance(fields, dict):
        raise ProtocolError(f"{topic}: header 'fields' must be an object", reason="header")
    parts = views[2:]
    specs = header["arrays"]
    if not isinstance(specs, list):
        raise ProtocolError(f"{kind}: header 'arrays' must be a list", reason="header")
    if len(parts) != len(specs):
        raise ProtocolError(f"{kind}: header lists {len(specs)} arrays but the message has "
                            f"{len(parts)} array parts", reason="parts")
    crc = 0
    for part in parts:
        crc = zlib.crc32(part, crc)
    if not _is_int(header["crc32"]) or header["crc32"] != crc:
        raise ProtocolError(f"{topic}: checksum mismatch (header crc32="
                            f"{_short(header['crc32'])}, payload {crc})", reason="checksum")
    if kind == _DICT:
        arrays = _arrays(kind, specs, parts, None)
        record = dict(fields)
        for name, arr in arrays.items():
            if name in record:
                raise ProtocolError(f"{topic}: key {name!r} is both a field and an array",
                                    reason="arrays")
            arr = arr.copy() if arr.flags.writeable else arr
            arr.setflags(write=False)
            record[name] = arr
        return topic, record
    schema = _BY_NAME[kind]
    arrays = _arrays(kind, specs, parts, schema.arrays)
    scalars = schema.scalars
    if not fields.keys() <= scalars.keys():
        unknown = set(fields) - set(scalars)
        raise ProtocolError(f"{kind}: unknown fields {_short(sorted(unknown))}", reason="field")
    if not schema.required_scalars <= fields.keys():
        absent = schema.required_scalars - set(fields)
        raise ProtocolError(f"{kind}: missing fields {sorted(absent)}", reason="field")
    values: dict[str, Any] = {}
    for name, raw in fields.items():
        want = scalars[name]
        # The common case needs no conversion (the checks below would return raw as it is);
        # the message text is only made for the rest.
        if _SAME_TYPE.get(type(raw)) == want and (want != "int" or _INT_MIN <= raw <= _INT_MAX):
            values[name] = raw
        elif want == "float" and type(raw) is str and raw in _NON_FINITE_TEXT:
            values[name] = float(raw)
        else:
            values[name] = _scalar(want, raw, f"{kind}.{name}")
    for name in schema.finite:
        v = values.get(name, arrays.get(name))
        if v is None:
            continue
        ok = math.isfinite(v) if isinstance(v, float) else bool(np.isfinite(v).all())
        if not ok:
            raise ProtocolError(f"{kind}.{name} must be finite", reason="not_finite")
    values.update(arrays)
    try:
        record = schema.cls(**values)
    except (ValueError, TypeError, OverflowError) as exc:
        raise ProtocolError(f"{kind}: {_short(str(exc))}", reason="record") from None
    return topic, record
