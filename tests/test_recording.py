"""Recordings: round trips, torn tails, corruption, rotation, a real crash of the writer."""

import os
import struct
import subprocess
import sys
import textwrap

import numpy as np
import pytest
from protocol_helpers import make_map, wifi_like_plan

from brimline.daemon.errors import RecordingError
from brimline.daemon.records import Estimate, LoadMap
from brimline.daemon.wire import codec
from brimline.daemon.wire.recording import (
    MAGIC,
    RecordReader,
    RecordWriter,
    TornRecordWarning,
    read_recording,
    recording_paths,
)


def _estimate(frame):
    plan = wifi_like_plan()
    n = plan.data_tones.size
    return Estimate(frame=frame, time_s=frame * 1e-3, plan_id=plan.plan_id,
                    tone_index=plan.data_tones, channel=np.full(n, 0.5 + 0.5j),
                    noise_var=np.full(n, 0.01), snr_db=np.full(n, 17.0 + frame))


def _write(path, n=5, **kw):
    with RecordWriter(path, meta={"scenario": "bench"}, **kw) as w:
        for i in range(n):
            w.write("estimate", _estimate(i))
            w.write("map", make_map(i))
            w.write("decision", {"kind": "keep", "frame": i})
    return path


def _record_offsets(path):
    """Byte offset of each record (meta first) by walking the documented layout."""
    data = path.read_bytes()
    pos, out = len(MAGIC), []
    while pos < len(data):
        out.append(pos)
        (size,) = struct.unpack_from("<I", data, pos)
        pos += 8 + size
    return out


class TestRoundTrip:
    def test_everything_comes_back_in_order(self, tmp_path):
        path = _write(tmp_path / "run.brl")
        with RecordReader(path) as r:
            items = list(r)
            assert r.meta["scenario"] == "bench" and r.meta["format"] == "brimline record log"
            assert r.torn == 0
        assert [t for t, _ in items] == ["estimate", "map", "decision"] * 5
        assert isinstance(items[0][1], Estimate) and isinstance(items[1][1], LoadMap)
        assert items[-3][1].snr_db[0] == 21.0
        assert items[-1][1] == {"kind": "keep", "frame": 4}

    def test_topic_filters(self, tmp_path):
        path = _write(tmp_path / "run.brl", topics=["map"])
        with RecordReader(path) as r:
            assert [t for t, _ in r] == ["map"] * 5
        with RecordReader(_write(tmp_path / "all.brl"), topics=["decision"]) as r:
            assert len(list(r)) == 5

    def test_write_frames_records_what_was_sent(self, tmp_path):
        frames = codec.encode("map", make_map(9))
        with RecordWriter(tmp_path / "f.brl") as w:
            assert w.write_frames(frames)
        with RecordReader(tmp_path / "f.brl") as r:
            (raw,) = list(r.frames())
        assert raw == [bytes(memoryview(f).cast("B")) for f in frames]

    def test_existing_file_is_never_overwritten(self, tmp_path):
        path = _write(tmp_path / "run.brl")
        with pytest.raises(RecordingError, match="exists already"):
            RecordWriter(path)

    def test_rotation(self, tmp_path):
        path = _write(tmp_path / "run.brl", n=30, max_bytes=4096)
        paths = recording_paths(path)
        assert len(paths) > 2 and paths[1].name == "run.0001.brl"
        items = []
        for p in paths:
            with RecordReader(p) as r:
                items += list(r)
        assert len(items) == 90
        assert [t for t, _ in read_recording(path, topics=["map"])] == ["map"] * 30
        assert [m.seq for t, m in items if t == "map"] == list(range(30))

    def test_closed_writer(self, tmp_path):
        w = RecordWriter(tmp_path / "x.brl")
        w.close()
        w.close()
        with pytest.raises(RuntimeError, match="closed"):
            w.write("map", make_map(1))


class TestDamage:
    def test_every_torn_tail_stops_cleanly(self, tmp_path):
        """Cut the file at every byte of its last record: all earlier records read back, the
        torn one is counted and warned about, nothing raises."""
        path = _write(tmp_path / "run.brl", n=2)
        data = path.read_bytes()
        last = _record_offsets(path)[-1]
        cut_path = tmp_path / "cut.brl"
        for cut in range(last + 1, len(data)):
            cut_path.write_bytes(data[:cut])
            with pytest.warns(TornRecordWarning, match="record 6 is torn"):
                with RecordReader(cut_path) as r:
                    items = list(r)
            assert len(items) == 5 and r.torn == 1

    def test_clean_cut_at_a_record_boundary_is_not_torn(self, tmp_path):
        path = _write(tmp_path / "run.brl", n=2)
        last = _record_offsets(path)[-1]
        path.write_bytes(path.read_bytes()[:last])
        with RecordReader(path) as r:
            assert len(list(r)) == 5 and r.torn == 0

    def test_garbage_in_the_last_record_is_a_torn_tail(self, tmp_path):
        path = _write(tmp_path / "run.brl", n=2)
        data = bytearray(path.read_bytes())
        data[-3] ^= 0xFF
        path.write_bytes(bytes(data))
        with pytest.warns(TornRecordWarning, match="checksum mismatch at the end"):
            with RecordReader(path) as r:
                assert len(list(r)) == 5

    def test_corruption_in_the_middle_names_file_and_record(self, tmp_path):
        path = _write(tmp_path / "run.brl", n=3)
        offsets = _record_offsets(path)
        data = bytearray(path.read_bytes())
        data[offsets[4] + 20] ^= 0x01  # inside record 4 (the meta record is 0)
        path.write_bytes(bytes(data))
        with RecordReader(path) as r:
            with pytest.raises(RecordingError, match=rf"{path}: record 4: checksum mismatch"):
                list(r)

    def test_absurd_length_is_corruption(self, tmp_path):
        path = _write(tmp_path / "run.brl", n=2)
        offsets = _record_offsets(path)
        data = bytearray(path.read_bytes())
        data[offsets[2]:offsets[2] + 4] = struct.pack("<I", 0xFFFFFFFF)
        path.write_bytes(bytes(data))
        with RecordReader(path) as r:
            with pytest.raises(RecordingError, match="record 2: length 4294967295 is corrupt"):
                list(r)

    def test_record_that_does_not_decode(self, tmp_path):
        path = tmp_path / "bad.brl"
        with RecordWriter(path) as w:
            w.write_frames([b"map", b'{"v": 9, "type": "dict", "fields": {}, "arrays": [], '
                                    b'"crc32": 0}'])
            w.write("status", {"ok": True})
        with RecordReader(path) as r:
            with pytest.raises(RecordingError, match="record 1: map: protocol version 9"):
                list(r)

    @pytest.mark.parametrize("content, match", [
        (b"", "bad magic"),
        (b"PK\x03\x04 a zip file", "bad magic"),
        (b"BRIMLOG\x02", r"format version b'\\x02'"),
    ])
    def test_not_a_recording(self, tmp_path, content, match):
        p = tmp_path / "x.brl"
        p.write_bytes(content)
        with pytest.raises(RecordingError, match=match):
            RecordReader(p)

    def test_missing_file(self, tmp_path):
        with pytest.raises(RecordingError, match="cannot open recording"):
            RecordReader(tmp_path / "nope.brl")
        with pytest.raises(RecordingError, match="no such recording"):
            list(read_recording(tmp_path / "nope.brl"))


def test_a_killed_writer_loses_at_most_the_record_being_written(tmp_path):
    """The writer process is killed (SIGKILL) mid-run: every record it finished reads back."""
    path = tmp_path / "crash.brl"
    script = textwrap.dedent(f"""
        import os, signal, sys
        sys.path.insert(0, {os.path.dirname(__file__)!r})
        from protocol_helpers import make_map
        from brimline.daemon.wire.recording import RecordWriter
        w = RecordWriter({str(path)!r})
        for i in range(40):
            w.write("map", make_map(i))
        w._file.write(b"\\x99\\x00\\x00\\x00partial")  # a record half written...
        w._file.flush()
        os.kill(os.getpid(), signal.SIGKILL)             # ...when the process dies
    """)
    proc = subprocess.run([sys.executable, "-c", script], timeout=30)
    assert proc.returncode == -9
    with pytest.warns(TornRecordWarning):
        with RecordReader(path) as r:
            seqs = [m.seq for _, m in r]
    assert seqs == list(range(40))


def test_record_section_builds_a_writer(tmp_path):
    import inspect

    from brimline.daemon.runtime.config import RecordSection
    assert set(RecordSection.model_fields) == set(inspect.signature(RecordWriter).parameters) \
        - {"meta"}
    section = RecordSection(path=str(tmp_path / "s.brl"), topics=["map"])
    with RecordWriter(**section.model_dump()) as w:
        assert not w.write("status", {"x": 1}) and w.write("map", make_map(1))
    assert RecordSection().path is None  # recording is off unless asked for
