"""SigMF through the sigmf package (brimline.daemon.wire.sigmf): writing with capture segments,
the tone-plan extension and the checksum; reading back with the library's own reader and
validator; the shipped captures; the IQ capture written while the daemon runs."""

import hashlib
import json
import warnings
from pathlib import Path

import numpy as np
import pytest
import sigmf

from brimline.daemon.errors import ConfigError, RecordingError, SourceError
from brimline.daemon.runtime.config import Config
from brimline.daemon.runtime.service import Service
from brimline.daemon.wire.sigmf import (
    EXTENSION,
    CaptureWriter,
    library_findings,
    read_sigmf,
    write_sigmf,
)
from brimline.drivers.link.frame import make_plan
from brimline.drivers.sources.iq import IqDriver
from brimline.drivers.sources.sim import SimDriver

REPLAY = Path(__file__).resolve().parents[1] / "replay"


def _noise(n, seed=5):
    rng = np.random.default_rng(seed)
    return (0.2 * (rng.standard_normal(n) + 1j * rng.standard_normal(n))).astype(np.complex64)


def _library_open(path):
    """The recording as the sigmf package reads it, with its checksum check and validation;
    fails on any warning (an undeclared extension namespace is a DeprecationWarning there)."""
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        handle = sigmf.fromfile(str(path) + ".sigmf-meta")  # skip_checksum=False: checks sha512
        handle.validate()
    return handle


class TestWriter:
    @pytest.mark.parametrize("datatype", ["cf32_le", "ci16_le"])
    def test_the_library_reads_back_what_was_written(self, tmp_path, datatype):
        """sigmf-python's ``SigMFFile.read_samples`` (its own reader and ci16 scaling by 2**-15)
        gives the samples we read; ``SigMFFile.validate`` accepts the metadata."""
        x = _noise(3000)
        write_sigmf(tmp_path / "a", x, sample_rate_hz=1e6, center_hz=2.4e9, datatype=datatype,
                    plan=make_plan(sample_rate_hz=1e6))
        handle = _library_open(tmp_path / "a")
        ours = read_sigmf(tmp_path / "a")
        assert ours.warnings == ()
        np.testing.assert_array_equal(handle.read_samples(), ours.samples(0, ours.n_samples))
        assert handle.get_global_field("core:sample_rate") == 1e6
        assert handle.get_captures()[0]["core:frequency"] == 2.4e9

    def test_checksum_is_the_sha512_of_the_data_file(self, tmp_path):
        """SigMF specification, global ``core:sha512``: the SHA-512 hash of the dataset file;
        checked here with hashlib, apart from the library."""
        write_sigmf(tmp_path / "h", _noise(100), sample_rate_hz=1e6)
        meta = json.loads((tmp_path / "h.sigmf-meta").read_text())
        digest = hashlib.sha512((tmp_path / "h.sigmf-data").read_bytes()).hexdigest()
        assert meta["global"]["core:sha512"] == digest

    def test_a_segment_at_every_gap_overflow_and_retune_restating_its_fields(self, tmp_path):
        """SigMF specification, captures: fields of a segment are not inherited by the next;
        ``core:global_index`` counts samples of the original stream (lost ones included)."""
        with CaptureWriter(tmp_path / "s", sample_rate_hz=1e6, center_hz=915e6,
                           datetime_s=0.0) as w:
            w.write(_noise(100))
            w.gap(50)
            w.write(_noise(100, seed=6))
            w.overflow()
            w.overflow(7)  # two reports before the next sample: one segment
            w.write(_noise(100, seed=7))
            w.retune(916e6)
            w.write(_noise(100, seed=8))
            w.gap(3)  # after the last sample: no empty segment at the end
        captures = json.loads((tmp_path / "s.sigmf-meta").read_text())["captures"]
        assert [c["core:sample_start"] for c in captures] == [0, 100, 200, 300]
        assert [c["core:global_index"] for c in captures] == [0, 150, 257, 357]
        assert [c[f"{EXTENSION}:segment"] for c in captures] == ["start", "gap", "overflow",
                                                                  "retune"]
        assert [c["core:frequency"] for c in captures] == [915e6, 915e6, 915e6, 916e6]
        assert [c["core:datetime"] for c in captures] == [  # global_index / 1 MS/s
            "1970-01-01T00:00:00.000000Z", "1970-01-01T00:00:00.000150Z",
            "1970-01-01T00:00:00.000257Z", "1970-01-01T00:00:00.000357Z"]
        _library_open(tmp_path / "s")
        rec = read_sigmf(tmp_path / "s")
        assert [(s.sample_start, s.sample_count, s.global_index) for s in rec.segments] == [
            (0, 100, 0), (100, 100, 150), (200, 100, 257), (300, 100, 357)]

    def test_tone_plan_extension_is_declared_and_read_back(self, tmp_path):
        plan = make_plan()
        write_sigmf(tmp_path / "p", _noise(10), sample_rate_hz=plan.sample_rate_hz, plan=plan)
        glob = json.loads((tmp_path / "p.sigmf-meta").read_text())["global"]
        assert {"name": EXTENSION, "version": "1.0.0", "optional": True} in glob[
            "core:extensions"]
        rec = read_sigmf(tmp_path / "p")
        assert rec.plan_id == plan.plan_id and rec.tone_plan.plan_id == plan.plan_id
        np.testing.assert_array_equal(rec.tone_plan.data_tones, plan.data_tones)

    def test_never_overwrites_and_closes_once(self, tmp_path):
        w = CaptureWriter(tmp_path / "o", sample_rate_hz=1e6)
        w.write(_noise(4))
        assert w.close() == w.close()
        with pytest.raises(RuntimeError, match="closed"):
            w.write(_noise(4))
        with pytest.raises(RecordingError, match=r"o.sigmf-data: exists already"):
            CaptureWriter(tmp_path / "o", sample_rate_hz=1e6)

    def test_abandoned_capture_leaves_nothing(self, tmp_path):
        CaptureWriter(tmp_path / "z", sample_rate_hz=1e6).abandon()
        assert list(tmp_path.iterdir()) == []

    @pytest.mark.parametrize("kwargs, match", [
        ({"datatype": "cu8"}, r"datatype='cu8'"),
        ({"sample_rate_hz": 0.0}, r"sample_rate_hz=0.0"),
    ])
    def test_bad_arguments(self, tmp_path, kwargs, match):
        args = {"sample_rate_hz": 1e6, **kwargs}
        with pytest.raises(ValueError, match=match):
            CaptureWriter(tmp_path / "b", **args)


class TestReader:
    def test_damaged_data_fails_its_checksum(self, tmp_path):
        write_sigmf(tmp_path / "d", _noise(100), sample_rate_hz=1e6)
        data = bytearray((tmp_path / "d.sigmf-data").read_bytes())
        data[10] ^= 0xFF
        (tmp_path / "d.sigmf-data").write_bytes(bytes(data))
        with pytest.raises(SourceError, match=r"d.sigmf-meta: core:sha512 does not match"):
            read_sigmf(tmp_path / "d")
        read_sigmf(tmp_path / "d", verify_checksum=False)

    def test_the_library_validation_is_a_warning(self, tmp_path):
        """SigMF schema: ``core:datetime`` is an RFC 3339 string; 12 is refused by the library's
        validation, which our field checks do not look at."""
        write_sigmf(tmp_path / "v", _noise(10), sample_rate_hz=1e6)
        meta = json.loads((tmp_path / "v.sigmf-meta").read_text())
        meta["captures"][0]["core:datetime"] = 12
        (tmp_path / "v.sigmf-meta").write_text(json.dumps(meta))
        rec = read_sigmf(tmp_path / "v")
        assert len(rec.warnings) == 1 and "SigMF validation: captures.0.core:datetime" in \
            rec.warnings[0] and "\n" not in rec.warnings[0]

    def test_undeclared_namespace_is_reported(self):
        meta = {"global": {"core:datatype": "cf32_le", "core:version": "1.2.0",
                           "other:thing": 1}, "captures": [{"core:sample_start": 0}],
                "annotations": []}
        assert any("undeclared" in f for f in library_findings(meta))

    def test_samples_are_memory_mapped(self, tmp_path):
        write_sigmf(tmp_path / "m", _noise(10), sample_rate_hz=1e6)
        assert isinstance(read_sigmf(tmp_path / "m").raw, np.memmap)


@pytest.mark.parametrize("meta_path", sorted(REPLAY.glob("*.sigmf-meta")), ids=lambda p: p.name)
def test_shipped_captures_pass_the_library_validation(meta_path):
    """Every capture in replay/ validates with the sigmf package (schema, declared extensions,
    checksum) and reads without a warning."""
    name = meta_path.with_suffix("")
    _library_open(name)
    assert read_sigmf(name).warnings == ()


def test_shipped_capture_is_what_its_script_makes(tmp_path, monkeypatch):
    """replay/make_link_capture.py reproduces the shipped files byte for byte."""
    import importlib.util
    spec = importlib.util.spec_from_file_location("make_link_capture",
                                                  REPLAY / "make_link_capture.py")
    script = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(script)
    monkeypatch.setattr(script, "HERE", tmp_path)
    script.main()
    for ext in (".sigmf-meta", ".sigmf-data"):
        assert (tmp_path / f"link-demo{ext}").read_bytes() == (
            REPLAY / f"link-demo{ext}").read_bytes()


class TestIqDriver:
    def _two_segments(self, tmp_path, plan, lost):
        sim = SimDriver(plan=plan, snr_db=30.0, seed=3, realtime=False)
        a, b = sim.capture(2, gap_samples=500), sim.capture(2, gap_samples=500)
        with CaptureWriter(tmp_path / "g", sample_rate_hz=plan.sample_rate_hz, plan=plan) as w:
            w.write(a)
            w.gap(lost)
            w.write(b)
        return a.size

    def test_each_segment_is_scanned_alone_and_times_count_lost_samples(self, tmp_path):
        plan = make_plan()
        first = self._two_segments(tmp_path, plan, lost=10_000)
        with IqDriver(plan=plan, path=str(tmp_path / "g")) as drv:
            ests = list(drv.frames())
        assert len(ests) == 4
        t = np.array([e.time_s for e in ests]) * plan.sample_rate_hz
        assert t[2] >= first + 10_000 and t[1] < first

    def test_recording_of_another_tone_plan_is_refused(self, tmp_path):
        write_sigmf(tmp_path / "q", _noise(1000), sample_rate_hz=3.84e6,
                    plan=make_plan(used_tones_half=90))
        with pytest.raises(ConfigError, match=r"driver.iq.path=.*recorded with tone plan"):
            IqDriver(plan=make_plan(), path=str(tmp_path / "q"))

    def test_driver_copies_what_it_reads_into_a_capture(self, tmp_path):
        plan = make_plan()
        self._two_segments(tmp_path, plan, lost=64)
        with CaptureWriter(tmp_path / "copy", sample_rate_hz=plan.sample_rate_hz,
                           plan=plan) as w:
            with IqDriver(plan=plan, path=str(tmp_path / "g"), capture=w) as drv:
                list(drv.frames())
        src, copy = read_sigmf(tmp_path / "g"), read_sigmf(tmp_path / "copy")
        assert copy.n_samples == src.n_samples
        np.testing.assert_array_equal(copy.samples(0, copy.n_samples),
                                      src.samples(0, src.n_samples))
        assert [(s.sample_start, s.global_index, s.reason) for s in copy.segments] == [
            (s.sample_start, s.global_index, s.reason) for s in src.segments]


def test_the_daemon_captures_iq_while_it_runs(tmp_path):
    """record.iq: a run from the shipped capture writes a capture the library validates."""
    cfg = Config.model_validate({
        "driver": {"kind": "iq", "iq": {"path": str(REPLAY / "link-demo")}},
        "publish": {"map_endpoint": "tcp://127.0.0.1:0", "snapshot_endpoint": "tcp://127.0.0.1:0",
                    "ack_endpoint": None},
        "status": {"endpoint": "tcp://127.0.0.1:0"},
        "record": {"iq": {"path": str(tmp_path / "live")}},
    })
    with Service(cfg) as svc:
        svc.start()
        svc.run(duration_s=60.0)  # ends with the recording
    _library_open(tmp_path / "live")
    src, live = read_sigmf(REPLAY / "link-demo"), read_sigmf(tmp_path / "live")
    assert live.n_samples == src.n_samples and live.plan_id == src.plan_id


def test_record_iq_needs_an_iq_source():
    with pytest.raises(ValueError, match=r"needs an IQ source"):
        Config.model_validate({"record": {"iq": {"path": "cap"}}})


def test_check_refuses_an_existing_capture(tmp_path, capsys):
    from brimline.daemon.commands import cli
    (tmp_path / "cap.sigmf-data").write_bytes(b"")
    cfg = tmp_path / "c.yaml"
    cfg.write_text(f"driver:\n  kind: iq\n  iq:\n    path: {REPLAY / 'link-demo'}\n"
                   f"record:\n  iq:\n    path: cap\n")
    assert cli.main(["run", "--config", str(cfg), "--check"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "record.iq.path=" in err[0] and "cap.sigmf-data exists already" \
        in err[0]
