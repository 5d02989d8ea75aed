"""Recordings: round trips, torn tails, corruption, rotation, a real crash of the writer, a disk
that fills up."""

import errno
import json
import logging
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
from brimline.daemon.wire import codec, recording
from brimline.daemon.wire.recording import (
    MAGIC,
    RecordReader,
    RecordSetReader,
    RecordWriter,
    count_records,
    read_recording,
    recording_paths,
)


class _Lines(logging.Handler):
    """Collects the messages of one logger (independent of how the root logger is set up)."""

    def __init__(self) -> None:
        super().__init__(logging.DEBUG)
        self.records: list[logging.LogRecord] = []

    def emit(self, record: logging.LogRecord) -> None:
        self.records.append(record)

    def warnings(self) -> list[str]:
        return [r.getMessage() for r in self.records if r.levelno == logging.WARNING]


@pytest.fixture
def recording_log():
    """The warnings of the ``brimline.recording`` logger during the test."""
    logger = logging.getLogger("brimline.recording")
    handler, level = _Lines(), logger.level
    logger.addHandler(handler)
    logger.setLevel(logging.DEBUG)
    yield handler
    logger.removeHandler(handler)
    logger.setLevel(level)


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

    def test_the_set_reader_walks_every_rotated_file_in_order(self, tmp_path):
        path = _write(tmp_path / "run.brl", n=30, max_bytes=4096)
        paths = recording_paths(path)
        with RecordSetReader(path, topics=["map"]) as r:
            assert r.paths == paths and r.meta["part"] == 0 and r.meta["scenario"] == "bench"
            seqs = [m.seq for _, m in r]
        assert seqs == list(range(30))
        assert r.records == 90 + len(paths)  # every file's meta record counted
        assert r.torn == 0

    def test_the_set_reader_counts_a_torn_tail_in_any_file(self, tmp_path, recording_log):
        path = _write(tmp_path / "run.brl", n=30, max_bytes=4096)
        last = recording_paths(path)[-1]
        last.write_bytes(last.read_bytes()[:-3])
        with RecordSetReader(path) as r:
            assert len(list(r)) == 89
        assert r.torn == 1 and len(recording_log.warnings()) == 1
        assert str(last) in recording_log.warnings()[0]

    def test_a_missing_part_is_an_error_not_a_short_replay(self, tmp_path):
        path = _write(tmp_path / "run.brl", n=30, max_bytes=4096)
        paths = recording_paths(path)
        assert len(paths) >= 3
        paths[1].unlink()
        with pytest.raises(RecordingError, match=r"part 1 \(run\.0001\.brl\) is missing but "
                                                 rf"part {len(paths) - 1} exists"):
            RecordSetReader(path)
        with pytest.raises(RecordingError, match="is missing"):
            list(read_recording(path))

    def test_a_set_without_its_first_file_is_no_recording(self, tmp_path):
        path = _write(tmp_path / "run.brl", n=30, max_bytes=4096)
        path.unlink()
        with pytest.raises(RecordingError, match="no such recording"):
            RecordSetReader(path)

    def test_the_set_reader_can_walk_the_set_again(self, tmp_path):
        path = _write(tmp_path / "run.brl", n=12, max_bytes=2048)
        with RecordSetReader(path, topics=["estimate"]) as r:
            first = [e.frame for _, e in r]
            again = [e.frame for _, e in r]
        assert first == again == list(range(12))
        with pytest.raises(RuntimeError, match="closed"):
            list(r)

    def test_closed_writer(self, tmp_path):
        w = RecordWriter(tmp_path / "x.brl")
        w.close()
        w.close()
        with pytest.raises(RuntimeError, match="closed"):
            w.write("map", make_map(1))


class TestCountRecords:
    """``count_records`` (for progress) reads lengths and topics only: on an intact recording
    it gives what a full read gives, and it never raises."""

    def test_same_count_as_a_full_read_over_a_rotated_set(self, tmp_path):
        path = _write(tmp_path / "run.brl", n=30, max_bytes=4096)
        assert len(recording_paths(path)) >= 3
        for topic in ("estimate", "map", "decision", "status"):
            read = sum(1 for t, _ in read_recording(path) if t == topic)
            assert count_records(path, topic) == read == (0 if topic == "status" else 30)

    def test_a_record_of_no_frames_is_skipped(self, tmp_path):
        path = tmp_path / "odd.brl"
        path.write_bytes(MAGIC + recording.pack_record([]) + recording.pack_record(
            codec.encode("estimate", _estimate(0))))
        assert count_records(path, "estimate") == 1

    def test_torn_or_foreign_files_stop_the_count_without_an_error(self, tmp_path):
        path = _write(tmp_path / "run.brl", n=3)
        data = path.read_bytes()
        last = _record_offsets(path)[-1]   # the third decision
        for cut in range(last, len(data)):
            path.write_bytes(data[:cut])
            # cut inside the last record's length or topic: not counted; cut in its body:
            # counted (a full read would call it torn: the count is for progress)
            assert count_records(path, "decision") in (2, 3)
            assert count_records(path, "estimate") == 3
        (tmp_path / "not.brl").write_bytes(b"plain text, no recording")
        assert count_records(tmp_path / "not.brl", "estimate") == 0
        assert count_records(tmp_path / "missing.brl", "estimate") == 0


class TestDamage:
    def test_every_torn_tail_stops_cleanly(self, tmp_path, recording_log):
        """Cut the file at every byte of its last record: all earlier records read back, the
        torn one is counted and logged once (one warning naming file and record), nothing
        raises."""
        path = _write(tmp_path / "run.brl", n=2)
        data = path.read_bytes()
        last = _record_offsets(path)[-1]
        cut_path = tmp_path / "cut.brl"
        for cut in range(last + 1, len(data)):
            cut_path.write_bytes(data[:cut])
            recording_log.records.clear()
            with RecordReader(cut_path) as r:
                items = list(r)
            assert len(items) == 5 and r.torn == 1
            (line,) = recording_log.warnings()
            assert line.startswith(f"{cut_path}: record 6 is torn (") and "\n" not in line

    def test_torn_tail_goes_through_logging_not_warnings(self, tmp_path, recording_log):
        """The torn record reaches the ``brimline.recording`` logger (so ``--log-json`` formats
        it) and raises no Python warning."""
        import warnings

        path = _write(tmp_path / "run.brl", n=2)
        path.write_bytes(path.read_bytes()[:-5])
        with warnings.catch_warnings():
            warnings.simplefilter("error")
            with RecordReader(path) as r:
                list(r)
        (rec,) = [x for x in recording_log.records if x.levelno == logging.WARNING]
        assert rec.name == "brimline.recording" and r.torn == 1

    def test_clean_cut_at_a_record_boundary_is_not_torn(self, tmp_path, recording_log):
        path = _write(tmp_path / "run.brl", n=2)
        last = _record_offsets(path)[-1]
        path.write_bytes(path.read_bytes()[:last])
        with RecordReader(path) as r:
            assert len(list(r)) == 5 and r.torn == 0
        assert recording_log.warnings() == []

    def test_garbage_in_the_last_record_is_a_torn_tail(self, tmp_path, recording_log):
        """A flipped byte is caught by the record's CRC-32 (the ISO 3309 / IEEE 802.3
        polynomial that zlib.crc32 computes detects every single-byte error)."""
        path = _write(tmp_path / "run.brl", n=2)
        data = bytearray(path.read_bytes())
        data[-3] ^= 0xFF
        path.write_bytes(bytes(data))
        with RecordReader(path) as r:
            assert len(list(r)) == 5
        (line,) = recording_log.warnings()
        assert "checksum mismatch at the end" in line

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


def test_a_killed_writer_loses_at_most_the_record_being_written(tmp_path, recording_log):
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
    with RecordReader(path) as r:
        seqs = [m.seq for _, m in r]
    assert seqs == list(range(40)) and r.torn == 1
    assert len(recording_log.warnings()) == 1


def test_record_section_builds_a_writer(tmp_path):
    import inspect

    from brimline.daemon.runtime.config import RecordSection
    # ``record.iq`` is the IQ capture's own sub-section (brimline.daemon.wire.sigmf)
    assert set(RecordSection.model_fields) - {"iq"} == set(
        inspect.signature(RecordWriter).parameters) - {"meta"}
    section = RecordSection(path=str(tmp_path / "s.brl"), topics=["map"])
    with RecordWriter(**section.writer_arguments()) as w:
        assert not w.write("status", {"x": 1}) and w.write("map", make_map(1))
    assert RecordSection().path is None  # recording is off unless asked for


class _FullDisk:
    """Room left on an imagined disk, shared by every file opened through :meth:`open`.

    A write that does not fit fails with ``OSError(ENOSPC)``, the error POSIX ``write()`` gives
    when "there was no free space remaining on the device" (POSIX.1-2017, write(), ERRORS; from
    memory). ``stuck=True`` also makes later flushes and the close fail, as a buffered file
    does while it still holds bytes it could not write.
    """

    def __init__(self, room: int, *, stuck: bool = False) -> None:
        self.room = room
        self.stuck = stuck
        self.full = False

    def open(self, path, mode="r", *args, **kwargs):
        return _FillingFile(open(path, mode, *args, **kwargs), self)


class _FillingFile:
    def __init__(self, f, disk: _FullDisk) -> None:
        self._f = f
        self._disk = disk

    def _enospc(self):
        self._disk.full = True
        return OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    def write(self, data):
        if len(data) > self._disk.room:
            raise self._enospc()
        self._disk.room -= len(data)
        return self._f.write(data)

    def flush(self):
        if self._disk.stuck and self._disk.full:
            raise self._enospc()
        self._f.flush()

    def fileno(self):
        return self._f.fileno()

    def close(self):
        self._f.close()
        if self._disk.stuck and self._disk.full:
            raise self._enospc()


def _map_record_size():
    return len(recording.pack_record(codec.encode("map", make_map(0))))


def _header_size(tmp_path):
    with RecordWriter(tmp_path / "probe.brl"):
        pass
    size = (tmp_path / "probe.brl").stat().st_size
    (tmp_path / "probe.brl").unlink()
    return size


class TestDiskFull:
    @pytest.mark.parametrize("stuck", [False, True])
    def test_a_full_disk_fails_the_writer_once_and_close_stays_quiet(self, tmp_path, monkeypatch,
                                                                     stuck):
        room = _header_size(tmp_path) + 7 * _map_record_size() + 10
        monkeypatch.setattr(recording, "open", _FullDisk(room, stuck=stuck).open, raising=False)
        path = tmp_path / "run.brl"
        w = RecordWriter(path)
        for i in range(7):
            assert w.write("map", make_map(i))
        assert not w.failed
        with pytest.raises(RecordingError, match=rf"{path}: write failed after 7 records: "
                                                 r"\[Errno 28\]") as first:
            w.write("map", make_map(7))
        assert isinstance(first.value.__cause__, OSError)
        assert w.failed and w.error is first.value
        with pytest.raises(RecordingError, match="recording stopped: .*write failed"):
            w.write("map", make_map(8))  # refused at once, the file is not touched
        w.close()  # no raw OSError, not even from a buffer that cannot be flushed
        w.close()
        with pytest.raises(RuntimeError, match="closed"):
            w.write("map", make_map(9))
        monkeypatch.undo()
        with RecordReader(path) as r:
            assert [m.seq for _, m in r] == list(range(7)) and r.torn == 0

    def test_a_failing_final_flush_is_one_recording_error(self, tmp_path, monkeypatch):
        disk = _FullDisk(1 << 20, stuck=True)
        monkeypatch.setattr(recording, "open", disk.open, raising=False)
        w = RecordWriter(tmp_path / "run.brl")
        w.write("map", make_map(1))
        disk.full = True  # the device goes away between two records
        with pytest.raises(RecordingError, match="closing failed after 1 records"):
            w.close()
        w.close()  # once only
        assert w.failed

    def test_a_start_on_a_full_disk_leaves_no_file_behind(self, tmp_path, monkeypatch):
        monkeypatch.setattr(recording, "open", _FullDisk(20).open, raising=False)
        path = tmp_path / "run.brl"
        with pytest.raises(RecordingError, match=rf"{path}: cannot start recording: "
                                                 r"\[Errno 28\]"):
            RecordWriter(path)
        assert list(tmp_path.iterdir()) == []
        monkeypatch.undo()
        with RecordWriter(path) as w:  # the next start is not refused ("exists already")
            w.write("map", make_map(1))
        with RecordReader(path) as r:
            assert len(list(r)) == 1

    def test_a_rotation_on_a_full_disk_fails_without_an_empty_part(self, tmp_path, monkeypatch):
        per_map, head = _map_record_size(), _header_size(tmp_path)
        in_first = -(-(1024 - head) // per_map)  # maps written before the file reaches 1024
        room = head + in_first * per_map + head - 1  # all but one byte of the next header
        monkeypatch.setattr(recording, "open", _FullDisk(room).open, raising=False)
        path = tmp_path / "run.brl"
        w = RecordWriter(path, max_bytes=1024)
        with pytest.raises(RecordingError, match=r"run\.0001\.brl: cannot start recording"):
            for i in range(100):
                w.write("map", make_map(i))
        written = w.records
        assert written == in_first
        with pytest.raises(RecordingError, match="recording stopped"):
            w.write("map", make_map(100))
        w.close()
        monkeypatch.undo()
        assert sorted(p.name for p in tmp_path.iterdir()) == ["run.brl"]
        assert [m.seq for _, m in read_recording(path)] == list(range(written))


_FSIZE_SCRIPT = """
import json, resource, signal, sys
sys.path.insert(0, {tests!r})
from protocol_helpers import make_map
from brimline.daemon.errors import RecordingError
from brimline.daemon.wire.recording import RecordWriter
signal.signal(signal.SIGXFSZ, signal.SIG_IGN)   # write() then fails with EFBIG
resource.setrlimit(resource.RLIMIT_FSIZE, ({limit}, resource.RLIM_INFINITY))
out = {{"started": False, "written": 0, "errors": []}}
try:
    w = RecordWriter({path!r})
    out["started"] = True
    for i in range(10000):
        try:
            w.write("map", make_map(i))
            out["written"] += 1
        except RecordingError as exc:
            out["errors"].append(str(exc))
            if len(out["errors"]) == 2:
                break
    w.close()
except RecordingError as exc:
    out["errors"].append(str(exc))
print(json.dumps(out))
"""


@pytest.mark.parametrize("limit", [200, 30000])
def test_a_real_file_size_limit(tmp_path, limit, recording_log):
    """A real kernel refusal: under RLIMIT_FSIZE with SIGXFSZ ignored, a write past the limit
    fails with EFBIG (POSIX.1-2017 setrlimit(), RLIMIT_FSIZE; from memory). At 200 bytes the
    header does not fit and no file is left; at 30000 bytes the writer fails once, refuses the
    next write, closes without a traceback, and what it wrote reads back."""
    pytest.importorskip("resource")
    path = tmp_path / "rec" / "run.brl"
    path.parent.mkdir()
    script = _FSIZE_SCRIPT.format(tests=os.path.dirname(__file__), limit=limit, path=str(path))
    proc = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True,
                          timeout=60)
    assert proc.returncode == 0 and proc.stderr == "", proc.stderr
    out = json.loads(proc.stdout)
    if limit == 200:
        assert not out["started"] and "cannot start recording" in out["errors"][0]
        assert list(path.parent.iterdir()) == []
        return
    assert out["started"] and out["written"] > 0
    assert "write failed after" in out["errors"][0] and "File too large" in out["errors"][0]
    assert out["errors"][1].startswith("recording stopped: ")
    with RecordReader(path) as r:
        seqs = [m.seq for _, m in r]
    assert seqs == list(range(out["written"]))  # a partial last record is a torn tail
    assert path.stat().st_size <= limit
