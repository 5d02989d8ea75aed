"""The codec: round trips, the byte layout against published encodings, every malformed case."""

import json
import math
import struct
import zlib

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

from brimline.daemon.errors import ProtocolError
from brimline.daemon.records import DecisionKind, Estimate, LoadMap, TonePlan
from brimline.daemon.wire import codec


def _map(n=6, seq=3, **kw):
    bits = np.array([2, 0, 4, 6, 0, 8][:n] * (n // 6 + 1))[:n]
    power = np.where(bits > 0, 0.75, 0.0)
    base = dict(epoch="c0ffee", seq=seq, effective_frame=120, created_s=12.5, plan_id="abc123",
                tone_index=np.arange(-n // 2, n - n // 2), bits=bits, power_lin=power,
                total_bits=int(bits.sum()), margin_db=3.25, gap_db=9.75, reason="reload")
    base.update(kw)
    return LoadMap(**base)


def _estimate(n=5):
    tones = np.arange(1, n + 1)
    return Estimate(frame=7, time_s=0.125, plan_id="abc123", tone_index=tones,
                    channel=np.exp(1j * tones), noise_var=np.full(n, 0.01),
                    snr_db=np.linspace(5, 25, n), map_seq_seen=3, cfo_hz=-120.5)


def _assert_same(a, b):
    assert type(a) is type(b)
    for name in a.__dataclass_fields__:
        x, y = getattr(a, name), getattr(b, name)
        if isinstance(x, np.ndarray):
            assert x.dtype == y.dtype and x.shape == y.shape
            np.testing.assert_array_equal(x, y)
        elif isinstance(x, float) and math.isnan(x):
            assert math.isnan(y)
        else:
            assert x == y, name


def _header(frames):
    return json.loads(bytes(frames[1]))


def _with_header(frames, **changes):
    head = _header(frames)
    head.update(changes)
    return [frames[0], json.dumps(head).encode(), *frames[2:]]


class TestRoundTrip:
    def test_load_map(self):
        m = _map(margin_db=math.inf)
        topic, back = codec.decode(codec.encode("map", m))
        assert topic == "map"
        _assert_same(m, back)

    def test_estimate_with_nan_centre_frequency(self):
        e = _estimate()
        topic, back = codec.decode(codec.encode("estimate", e))
        assert topic == "estimate"
        _assert_same(e, back)

    def test_tone_plan(self):
        plan = TonePlan(64, 16, 20e6, [t for t in range(-26, 27) if t not in (0, -21, -7, 7, 21)],
                        [-21, -7, 7, 21])
        _, back = codec.decode(codec.encode("plan", plan))
        assert back.plan_id == plan.plan_id

    def test_dict_with_arrays_enums_and_non_finite(self):
        msg = {"kind": DecisionKind.BIT_SWAP, "n": np.int64(4), "x": np.float32(0.5),
               "margin_db": math.inf, "nested": {"a": [1, 2.5]}, "snr_db": np.arange(4.0)}
        topic, back = codec.decode(codec.encode("status", msg))
        assert topic == "status"
        assert back["kind"] == "bit_swap" and back["n"] == 4 and back["x"] == 0.5
        assert back["margin_db"] == "inf"  # documented: a dict keeps the string spelling
        assert back["nested"] == {"a": [1, 2.5]}
        np.testing.assert_array_equal(back["snr_db"], np.arange(4.0))
        assert not back["snr_db"].flags.writeable

    def test_decodes_zmq_frames_and_memoryviews(self):
        zmq = pytest.importorskip("zmq")
        frames = codec.encode("map", _map())
        as_frames = [zmq.Frame(bytes(memoryview(f))) for f in frames]
        _assert_same(codec.decode(as_frames)[1], _map())

    @settings(max_examples=60, deadline=None)
    @given(n=st.integers(0, 300), seed=st.integers(0, 2**32 - 1),
           reason=st.text(max_size=40), seq=st.integers(0, 2**53))
    def test_load_map_property(self, n, seed, reason, seq):
        rng = np.random.default_rng(seed)
        bits = rng.integers(0, 16, n)
        power = np.where(bits > 0, rng.uniform(0.01, 4, n), 0.0)
        m = LoadMap("e", seq, 0, 1.0, "p", np.arange(n), bits, power, int(bits.sum()),
                    float(rng.normal()), 9.8, reason=reason)
        _assert_same(m, codec.decode(codec.encode("map", m))[1])

    @settings(max_examples=40, deadline=None)
    @given(snr=hnp.arrays(np.float32, st.integers(0, 64),
                          elements=st.floats(allow_nan=True, allow_infinity=True, width=32)),
           frame=st.integers(0, 2**62), centre=st.floats(allow_nan=True, allow_infinity=True))
    def test_estimate_property_keeps_non_finite_content(self, snr, frame, centre):
        """Judging content (a NaN SNR) is the estimator's job: the codec carries it intact."""
        n = snr.size
        e = Estimate(frame=frame, time_s=1.0, plan_id="p", tone_index=np.arange(n),
                     channel=snr.astype(np.complex64), noise_var=snr, snr_db=snr,
                     center_hz=centre)
        _assert_same(e, codec.decode(codec.encode("estimate", e))[1])

    @settings(max_examples=60, deadline=None)
    @given(arr=hnp.arrays(
        dtype=st.sampled_from([np.float32, np.float64, np.int16, np.uint8, np.complex64,
                               np.dtype(">f8"), np.dtype(">i4"), np.bool_]),
        shape=hnp.array_shapes(min_dims=0, max_dims=3, min_side=0, max_side=5)))
    def test_dict_arrays_any_shape_and_byte_order(self, arr):
        _, back = codec.decode(codec.encode("status", {"a": arr}))
        assert back["a"].shape == arr.shape
        np.testing.assert_array_equal(back["a"], arr)


class TestByteLayout:
    def test_crc32_is_the_iso_hdlc_polynomial(self):
        """CRC-32/ISO-HDLC check value 0xCBF43926 for b"123456789" (Greg Cook's Catalogue of
        parametrised CRC algorithms; the same CRC as IEEE 802.3 and zlib; value from memory)."""
        assert zlib.crc32(b"123456789") == 0xCBF43926

    def test_arrays_are_little_endian_ieee754(self):
        """IEEE 754 binary32 1.0 is 0x3F800000 and 0.75 is 0x3F400000; int16 -3 is 0xFFFD in
        two's complement; little-endian puts the low byte first."""
        m = _map(n=6)
        frames = codec.encode("map", m)
        head = _header(frames)
        assert [a["name"] for a in head["arrays"]] == ["tone_index", "bits", "power_lin"]
        assert [a["dtype"] for a in head["arrays"]] == ["<i2", "|u1", "<f4"]
        assert bytes(frames[2])[:2] == b"\xfd\xff"
        assert bytes(frames[4])[:4] == b"\x00\x00\x40\x3f"
        assert struct.unpack("<6f", bytes(frames[4]))[0] == 0.75
        assert head["crc32"] == zlib.crc32(b"".join(bytes(f) for f in frames[2:]))
        assert head["v"] == codec.PROTOCOL_VERSION == 1

    def test_header_is_strict_json(self):
        frames = codec.encode("map", _map(margin_db=math.inf))
        text = bytes(frames[1]).decode()
        assert "Infinity" not in text and "NaN" not in text
        assert _header(frames)["fields"]["margin_db"] == "inf"

    def test_array_parts_are_zero_copy_views(self):
        m = _map(n=600)
        frames = codec.encode("map", m)
        assert isinstance(frames[4], memoryview)
        assert np.shares_memory(np.frombuffer(frames[4], np.float32), m.power_lin)


class TestMalformed:
    @pytest.mark.parametrize("mutate, match", [
        (lambda f: f[:1], "needs at least topic and header"),
        (lambda f: [b"\xff\xfe", *f[1:]], "not ASCII"),
        (lambda f: [b"", *f[1:]], "topic is empty"),
        (lambda f: [f[0], b"{not json", *f[2:]], "not JSON"),
        (lambda f: [f[0], b"\xff", *f[2:]], "not JSON"),
        (lambda f: [f[0], b"[1, 2]", *f[2:]], "not a JSON object"),
        (lambda f: [f[0], b"[" * 100_000 + b"]" * 100_000, *f[2:]], "not JSON"),
        (lambda f: [f[0], b"{}", *f[2:]], r"lacks \['arrays', 'crc32', 'fields', 'type', 'v'\]"),
        (lambda f: _with_header(f, v=2), "protocol version 2"),
        (lambda f: _with_header(f, type="pickle"), "unknown record type 'pickle'"),
        (lambda f: f[:-1], "lists 3 arrays but the message has 2"),
        (lambda f: [*f, b"extra"], "lists 3 arrays but the message has 4"),
        (lambda f: [*f[:4], bytes(f[4])[:-1]], "checksum mismatch"),
        (lambda f: [*f[:4], bytes(4) + bytes(f[4])[4:]], "checksum mismatch"),
    ])
    def test_structure(self, mutate, match):
        with pytest.raises(ProtocolError, match=match):
            codec.decode(mutate(codec.encode("map", _map())))

    def _refit(self, frames, head):
        """Re-encode a header after changing it, with a correct checksum for its parts."""
        head["crc32"] = zlib.crc32(b"".join(bytes(p) for p in frames[2:]))
        return [frames[0], json.dumps(head).encode(), *frames[2:]]

    @pytest.mark.parametrize("change, match", [
        (lambda h: h["arrays"][2].update(dtype="<f8"), r"power_lin: dtype '<f8', expected"),
        (lambda h: h["arrays"][2].update(dtype="|O"), "dtype '|O' is not allowed"),
        (lambda h: h["arrays"][2].update(shape=[7]), r"needs 28 bytes, part has 24"),
        (lambda h: h["arrays"][2].update(shape=[-6]), "not a list of sizes"),
        (lambda h: h["arrays"][2].update(name="gain"), "unknown array 'gain'"),
        (lambda h: h["arrays"][2].pop("shape"), "exactly name, dtype, shape"),
        (lambda h: h["fields"].pop("seq"), r"missing fields \['seq'\]"),
        (lambda h: h["fields"].update(colour="red"), r"unknown fields \['colour'\]"),
        (lambda h: h["fields"].update(seq="3"), "load_map.seq='3' is not an integer"),
        (lambda h: h["fields"].update(seq=True), "is not an integer"),
        (lambda h: h["fields"].update(seq=-1), "seq=-1 must be >= 0"),
        (lambda h: h["fields"].update(gap_db="nan"), "load_map.gap_db must be finite"),
        (lambda h: h["fields"].update(created_s="soon"), "is not a number"),
        (lambda h: h["fields"].update(fallback=1), "is not a boolean"),
        (lambda h: h["fields"].update(epoch=5), "is not a string"),
        (lambda h: h.update(fields=[]), "'fields' must be an object"),
        (lambda h: h.update(arrays={}), "'arrays' must be a list"),
    ])
    def test_fields_and_arrays(self, change, match):
        frames = codec.encode("map", _map())
        head = _header(frames)
        change(head)
        with pytest.raises(ProtocolError, match=match):
            codec.decode(self._refit(frames, head))

    def test_non_finite_power_is_refused(self):
        m = _map()
        frames = codec.encode("map", m)
        power = np.array(m.power_lin)
        power[0] = np.nan
        frames[4] = power.astype("<f4").tobytes()
        with pytest.raises(ProtocolError, match="power_lin must be finite"):
            codec.decode(self._refit(frames, _header(frames)))

    def test_length_mismatch_between_arrays(self):
        frames = codec.encode("map", _map(n=6))
        head = _header(frames)
        head["arrays"][1]["shape"] = [5]
        frames[3] = bytes(frames[3])[:5]
        with pytest.raises(ProtocolError, match="bits has 5 tones, tone_index has 6"):
            codec.decode(self._refit(frames, head))

    def test_dict_key_both_field_and_array(self):
        frames = codec.encode("status", {"a": np.zeros(2)})
        head = _header(frames)
        head["fields"]["a"] = 1
        with pytest.raises(ProtocolError, match="both a field and an array"):
            codec.decode(self._refit(frames, head))

    def test_frame_that_is_not_bytes(self):
        with pytest.raises(ProtocolError, match="is not bytes"):
            codec.decode(["map", b"{}"])


class TestEncodeErrors:
    def test_unknown_record(self):
        with pytest.raises(TypeError, match="cannot encode a object"):
            codec.encode("x", object())

    def test_unencodable_dict_value(self):
        with pytest.raises(TypeError, match="status.when: a set cannot be encoded"):
            codec.encode("status", {"when": {1}})

    def test_bad_topic(self):
        with pytest.raises(TypeError, match="ASCII"):
            codec.encode("", {})


def test_encode_refuses_what_decoders_would_refuse():
    with pytest.raises(ValueError, match="load_map.power_lin must be finite to be encoded"):
        codec.encode("map", _map(power_lin=[np.nan, 0, 1, 1, 0, 1]))


def test_frames_may_be_numpy_arrays_of_any_dtype():
    frames = codec.encode("estimate", _estimate())
    as_arrays = frames[:2] + [np.frombuffer(f, dtype=d) for f, d in
                              zip(frames[2:], ["<i2", "<c8", "<f4", "<f4"])]
    _assert_same(codec.decode(as_arrays)[1], _estimate())


# --------------------------------------------------------------------------- hostile input
#
# Whatever bytes arrive, decode() raises ProtocolError and nothing else (a socket loop catches
# that one exception, counts it and goes on). The property tests feed arbitrary JSON headers,
# headers shaped almost like real ones (known type names, real and bogus dtypes, shapes,
# correct checksums so the deeper checks run) and arbitrary parts.

_JSON = st.recursive(
    st.none() | st.booleans() | st.integers() | st.integers(min_value=-(10**40), max_value=10**40)
    | st.floats(allow_nan=False, allow_infinity=False) | st.text(max_size=12),
    lambda inner: st.lists(inner, max_size=5) | st.dictionaries(st.text(max_size=8), inner,
                                                                max_size=5),
    max_leaves=25)
_LEAF = (st.none() | st.booleans() | st.integers() | st.sampled_from([2**64, -(10**30)])
         | st.floats(allow_nan=False, allow_infinity=False) | st.text(max_size=6))
# Cheap to draw: the near-real strategy below draws many of these per example.
_ODD = st.one_of(_LEAF, st.lists(_LEAF, max_size=3),
                 st.dictionaries(st.text(max_size=3), _LEAF, max_size=2))
_DTYPES = st.sampled_from(sorted(codec._ALLOWED_DTYPES) + [">f4", "O", "<U4", "V8", "", "|S3"])
_SIZES = st.one_of(st.integers(min_value=-2, max_value=64), st.sampled_from([10**30, 2**63]),
                   st.floats(allow_nan=False, allow_infinity=False), st.none(), st.text(max_size=3))
_SPEC = st.fixed_dictionaries({"name": st.one_of(st.sampled_from(
    ["tone_index", "bits", "power_lin", "channel", "noise_var", "snr_db", "data_tones",
     "pilot_tones", "null_tones", "x"]), _ODD),
    "dtype": st.one_of(_DTYPES, _ODD),
    "shape": st.one_of(st.lists(_SIZES, max_size=4), st.sampled_from([[1] * 60, [1] * 100]),
                       _ODD)})
_FIELDS = st.dictionaries(
    st.sampled_from(["epoch", "seq", "effective_frame", "created_s", "plan_id", "total_bits",
                     "margin_db", "gap_db", "reason", "fallback", "frame", "time_s",
                     "fft_size", "cp_len", "sample_rate_hz", "map_seq_seen", "valid", "zz"]),
    st.one_of(_ODD, st.sampled_from(["nan", "inf", "-inf", 2**70, 10**100])),
    max_size=10)


@st.composite
def _near_messages(draw):
    """A message shaped like a real one, with any field, spec or part wrong."""
    specs = draw(st.lists(_SPEC, max_size=4))
    parts = draw(st.lists(st.binary(max_size=64), min_size=len(specs), max_size=len(specs)))
    if draw(st.integers(0, 7)) == 0:  # now and then a part count that does not match
        parts = draw(st.lists(st.binary(max_size=64), max_size=5))
    crc = 0
    for p in parts:
        crc = zlib.crc32(p, crc)
    def mostly(good):  # a good value three times in four, so the later checks run too
        return draw(good) if draw(st.integers(0, 3)) else draw(_ODD)

    header = {"v": mostly(st.just(1)),
              "type": mostly(st.sampled_from(["load_map", "estimate", "tone_plan", "dict"])),
              "fields": mostly(_FIELDS),
              "arrays": mostly(st.just(specs)),
              "crc32": mostly(st.just(crc))}
    if draw(st.integers(0, 9)) == 0:
        for key in draw(st.lists(st.sampled_from(sorted(header)), max_size=2, unique=True)):
            del header[key]
    topic = (draw(st.sampled_from([b"map", b"ack", b"snapshot"])) if draw(st.integers(0, 3))
             else draw(st.binary(max_size=8)))
    return [topic, json.dumps(header).encode(), *parts]


def _only_protocol_errors(frames):
    try:
        codec.decode(frames)
    except ProtocolError as exc:
        assert isinstance(exc.reason, str) and exc.reason
        assert "\n" not in str(exc) and len(str(exc)) < 400  # one short line
    # any other exception fails the test with its traceback


class TestHostileInput:
    @settings(max_examples=400, deadline=None)
    @given(header=_JSON, parts=st.lists(st.binary(max_size=32), max_size=4),
           topic=st.one_of(st.sampled_from([b"ack", b"map"]), st.binary(max_size=8)))
    def test_arbitrary_json_header(self, header, parts, topic):
        _only_protocol_errors([topic, json.dumps(header).encode(), *parts])

    @settings(max_examples=600, deadline=None)
    @given(frames=_near_messages())
    def test_headers_shaped_like_real_ones(self, frames):
        _only_protocol_errors(frames)

    @settings(max_examples=300, deadline=None)
    @given(frames=st.lists(st.binary(max_size=48), max_size=6))
    def test_arbitrary_bytes(self, frames):
        _only_protocol_errors(frames)

    @settings(max_examples=200, deadline=None)
    @given(cut=st.integers(min_value=0, max_value=400), flip=st.integers(min_value=0))
    def test_real_map_truncated_or_bit_flipped(self, cut, flip):
        frames = [bytes(f) for f in codec.encode(codec.TOPIC_MAP, _map(n=12))]
        head = bytearray(frames[1])
        head[flip % len(head)] ^= 1 << (flip % 8)
        _only_protocol_errors([frames[0], bytes(head), *frames[2:]])
        _only_protocol_errors([frames[0], frames[1][:cut], *frames[2:]])

    @staticmethod
    def _header_of(**changes):
        frames = codec.encode(codec.TOPIC_MAP, _map())
        return _with_header(frames, **changes)

    @pytest.mark.parametrize("make, reason", [
        # the cases a hostile local client tried on the ack socket
        (lambda: TestHostileInput._header_of(type=["load_map"]), "type"),
        (lambda: TestHostileInput._header_of(type={"a": 1}), "type"),
        (lambda: _with_header(codec.encode("ack", {"x": np.zeros(3)}), arrays=[
            {"name": "x", "dtype": ["<f8"], "shape": [3]}]), "dtype"),
        (lambda: _with_header(codec.encode("ack", {"x": np.zeros(3)}), arrays=[
            {"name": "x", "dtype": "<U8", "shape": [3]}]), "dtype"),
        (lambda: _with_header(codec.encode("ack", {"x": np.zeros(1)}), arrays=[
            {"name": "x", "dtype": "<f8", "shape": [1] * 100}]), "shape"),
        (lambda: _with_header(codec.encode("ack", {"x": np.zeros(1)}), arrays=[
            {"name": "x", "dtype": "<f8", "shape": [10**30]}]), "size"),
        (lambda: _with_header(codec.encode("ack", {"x": np.zeros(1)}), arrays=[
            {"name": "x", "dtype": "<f8", "shape": [1e30]}]), "shape"),
        (lambda: _with_header(codec.encode("ack", {"x": np.zeros(1)}), arrays=[
            {"name": "x", "dtype": "<f8", "shape": [-1]}]), "shape"),
        (lambda: _with_header(codec.encode("ack", {"x": np.zeros(1)}), arrays=[
            {"name": "x", "dtype": "<f8", "shape": [0.5]}]), "shape"),
        (lambda: _with_header(codec.encode("ack", {"x": np.zeros(4)}), arrays=[
            {"name": "x", "dtype": "<f8", "shape": [3]}]), "size"),
        (lambda: _with_header(codec.encode("ack", {"x": np.zeros(1)}), arrays=[
            {"name": "x", "dtype": "<f8", "shape": [True]}]), "shape"),
        # NaN where integers belong: a JSON token the codec never writes, and the string form
        (lambda: [b"ack", b'{"v":1,"type":"dict","fields":{"seq":NaN},"arrays":[],"crc32":0}'],
         "header_json"),
        (lambda: TestHostileInput._header_of(fields={**_header(codec.encode("map", _map()))[
            "fields"], "seq": "nan"}), "field"),
        (lambda: TestHostileInput._header_of(fields={**_header(codec.encode("map", _map()))[
            "fields"], "seq": 2**64}), "field"),
        (lambda: TestHostileInput._header_of(fields={**_header(codec.encode("map", _map()))[
            "fields"], "margin_db": 10**400}), "field"),
        (lambda: [b"map", b'{"v":1,"type":"dict","fields":{"a":1e999},"arrays":[],"crc32":0}'],
         "header_json"),
        (lambda: [b"map", "{\"v\":1}".encode("utf-16")], "header_json"),
        (lambda: [b"map", b"\xff\xfe\x00{"], "header_json"),
        (lambda: [b"map", b"[" * 100_000 + b"]" * 100_000], "header_json"),
        (lambda: [b"map", b"{\"a\":" * 50_000 + b"1" + b"}" * 50_000], "header_json"),
        (lambda: [b"map", b"1" * 5000], "header_json"),  # over Python's int digit limit
        (lambda: [b"map", b" " * (2 << 20)], "header_size"),
        (lambda: [b"m\xe4p", b"{}"], "topic"),
        (lambda: [b"x" * 100, b"{}"], "topic"),
        (lambda: [b"map"] + [b""] * 40, "parts"),
        (lambda: TestHostileInput._header_of(v=True), "version"),
        (lambda: TestHostileInput._header_of(crc32="0"), "checksum"),
        # a tone plan asking for a 2**40-point FFT must not allocate it
        (lambda: _with_header(codec.encode("plan", TonePlan(64, 16, 20e6, [1, 2], [3])),
                              fields={"fft_size": 2**40, "cp_len": 16,
                                      "sample_rate_hz": 20e6}), "record"),
    ])
    def test_table(self, make, reason):
        with pytest.raises(ProtocolError) as info:
            codec.decode(make())
        assert info.value.reason == reason, str(info.value)

    def test_types_restrict_what_a_socket_accepts(self):
        frames = codec.encode(codec.TOPIC_MAP, _map())
        with pytest.raises(ProtocolError, match="not expected here") as info:
            codec.decode(frames, types={"dict"})
        assert info.value.reason == "type"
        assert codec.decode(frames, types={"load_map"})[0] == "map"

    def test_frame_bound_covers_the_largest_legitimate_frame(self):
        """An estimate of N tones has one complex64 (8 bytes) per tone in its largest part."""
        assert codec.max_frame_bytes() == 1 << 20
        n = 65536
        est = _estimate(n)
        largest = max(memoryview(f).nbytes for f in codec.encode("estimate", est))
        assert largest <= codec.max_frame_bytes(n)
