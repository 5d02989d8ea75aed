"""SigMF input: every malformed or inconsistent meta or data file gets one line naming the file
and the field (an error, or a warning where reading on is safe); ci16 full scale is 32768."""

import json
import logging
import re

import numpy as np
import pytest

from brimline.daemon.errors import ConfigError, SourceError
from brimline.drivers.link.frame import make_plan
from brimline.drivers.sources.iq import CI16_FULL_SCALE, IqDriver, read_sigmf, write_sigmf

N = 20_000


def _meta(glob=None, drop=(), **top):
    g = {"core:datatype": "cf32_le", "core:sample_rate": 1e6, "core:version": "1.0.0"}
    g.update(glob or {})
    for key in drop:
        g.pop(key)
    meta = {"global": g, "captures": [{"core:sample_start": 0}], "annotations": []}
    meta.update(top)
    return json.dumps(meta)


def _cf32(n, seed=3):
    rng = np.random.default_rng(seed)
    return (0.3 * (rng.standard_normal(n) + 1j * rng.standard_normal(n))).astype("<c8").tobytes()


def _ci16(n, rms=0.3 * 32768, seed=4):
    rng = np.random.default_rng(seed)
    return np.clip(np.rint(rms * rng.standard_normal(2 * n)), -32768, 32767).astype("<i2").tobytes()


def _files(tmp_path, meta, data):
    (tmp_path / "r.sigmf-meta").write_text(meta)
    if data is not None:
        (tmp_path / "r.sigmf-data").write_bytes(data)
    return tmp_path / "r"


class TestCi16Scale:
    def test_full_scale_is_32768_as_in_the_sigmf_library(self, tmp_path):
        """sigmf-python (1.14.0, file sigmf/sigmffile.py, ``SigMFFile._read_datafile`` and
        ``SigMFFile.__getitem__``) scales fixed-point data by ``2 ** -(component_size * 8 - 1)``,
        i.e. int16 by 1/32768: -32768 reads as -1.0 and +32767 as 32767/32768 (read from the
        package source; tests/test_sigmf.py also compares with the library's own reader)."""
        assert CI16_FULL_SCALE == 2.0 ** 15
        x = np.array([0.5 - 0.5j, 1.0 - 1.0j, 0.25 + 0.0j], np.complex64)
        write_sigmf(tmp_path / "s", x, sample_rate_hz=1e6, datatype="ci16_le")
        raw = np.fromfile(tmp_path / "s.sigmf-data", "<i2")
        assert raw.tolist() == [16384, -16384, 32767, -32768, 8192, 0]  # +1.0 saturates
        back = read_sigmf(tmp_path / "s").samples(0, 3)
        np.testing.assert_array_equal(back, np.array(
            [0.5 - 0.5j, 32767 / 32768 - 1.0j, 0.25], np.complex64))

    def test_both_ends_of_full_scale_count_as_clipped(self, tmp_path):
        plan = make_plan()
        write_sigmf(tmp_path / "c", np.full(4 * plan.frame_len, 2.0 + 0j),
                    sample_rate_hz=plan.sample_rate_hz, datatype="ci16_le")
        with IqDriver(plan=plan, path=str(tmp_path / "c")) as drv:
            clip = drv.receiver.clip_level
        assert 32767 / 32768 >= clip and 32766 / 32768 < clip


@pytest.mark.parametrize("meta, data, match", [
    (_meta({"core:version": "2.0.0"}), _cf32(N), r"r.sigmf-meta: core:version='2.0.0'"),
    (_meta({"core:version": 1}), _cf32(N), r"r.sigmf-meta: core:version=1 "),
    (_meta(), b"", r"r.sigmf-data: is empty"),
    (_meta({"core:datatype": "ci16_le"}), _cf32(N), r"r.sigmf-meta: core:datatype='ci16_le' but "
                                                     r"the data looks like float32"),
    (_meta(), _ci16(N + 1), r"r.sigmf-data: 80004 bytes is not a whole number of cf32_le"),
    (_meta(), _ci16(N), r"r.sigmf-meta: core:datatype='cf32_le' but \d+ of the first"),
    (_meta(), _cf32(N) + b"\0\0\0", r"r.sigmf-data: 160003 bytes is not a whole number"),
    (_meta(), np.full(N, np.nan, "<c8").tobytes(), r"are NaN, infinite"),
    (_meta(captures=[{"core:sample_start": 0}, {"core:sample_start": 10 * N}]), _cf32(N),
     r"r.sigmf-meta: captures\[1\].core:sample_start=200000 is past the end of the data "
     r"\(20000 samples"),
    (_meta(captures=[{"core:sample_start": N}]), _cf32(N), r"captures\[0\].core:sample_start=20000"),
    (_meta(captures={"core:sample_start": 0}), _cf32(N),
     r"r.sigmf-meta: captures must be a list of objects, got dict"),
    (_meta(captures="none"), _cf32(N), r"captures must be a list of objects, got str"),
    (_meta(captures=[1, 2]), _cf32(N), r"captures\[0\] must be an object, got int"),
    (_meta(captures=[{"core:sample_start": "0"}]), _cf32(N), r"captures\[0\].core:sample_start='0'"),
    (_meta(captures=[{"core:sample_start": -5}]), _cf32(N), r"captures\[0\].core:sample_start=-5"),
    (_meta(captures=[{"core:sample_start": 0, "core:frequency": "2.4 GHz"}]), _cf32(N),
     r"r.sigmf-meta: captures\[0\].core:frequency='2.4 GHz' must be a number of Hz"),
    (_meta(captures=[{"core:sample_start": 0, "core:frequency": True}]), _cf32(N),
     r"captures\[0\].core:frequency=True"),
    (_meta(captures=[{"core:sample_start": 0, "core:header_bytes": 16}]), _cf32(N),
     r"captures\[0\].core:header_bytes=16: non-conforming"),
    (_meta({"core:sample_rate": "1e6"}), _cf32(N), r"core:sample_rate='1e6'"),
    (_meta({"core:sample_rate": True}), _cf32(N), r"core:sample_rate=True"),
    (_meta().replace("1000000.0", "Infinity"), _cf32(N), r"core:sample_rate=inf"),
    (_meta({"core:num_channels": 2}), _cf32(N), r"core:num_channels=2"),
    (_meta({"core:trailing_bytes": 8}), _cf32(N), r"core:trailing_bytes=8"),
    ("[]", _cf32(N), r"r.sigmf-meta: no 'global' object"),
    ('{"global": []}', _cf32(N), r"no 'global' object"),
    ("[" * 100_000 + "]" * 100_000, _cf32(N), r"r.sigmf-meta: JSON nested too deeply"),
    (_meta().replace("1000000.0", "1" * 5000), _cf32(N), r"r.sigmf-meta: not valid JSON: Exceeds"),
    (_meta(), None, r"r.sigmf-data: no such SigMF data file"),
])
def test_bad_recordings_are_refused_in_one_line(tmp_path, meta, data, match):
    with pytest.raises(SourceError, match=match) as info:
        read_sigmf(_files(tmp_path, meta, data))
    assert "\n" not in str(info.value)


@pytest.mark.parametrize("meta, match", [
    (_meta(drop=["core:version"]), r"r.sigmf-meta: global has no core:version"),
    (_meta(annotations=[{"core:sample_start": 10, "core:sample_count": 10 * N}]),
     r"r.sigmf-meta: annotations reach sample 200010 but r.sigmf-data holds 20000 samples"),
    (_meta(annotations={"a": 1}), r"annotations must be a list of objects, got dict; annotations ignored"),
    (_meta(annotations=[{"core:sample_start": 0, "core:sample_count": "many"}]),
     r"annotations\[0\] .*'many' are not counts of samples"),
    (_meta(captures=[{"core:sample_start": 100}, {"core:sample_start": 0}]),
     r"captures\[1\].core:sample_start=0 comes before"),
    (_meta(captures=[{}]), r"captures\[0\] has no core:sample_start"),
])
def test_safe_problems_are_warnings(tmp_path, meta, match):
    rec = read_sigmf(_files(tmp_path, meta, _cf32(N)))
    assert len(rec.warnings) == 1 and "\n" not in rec.warnings[0]
    assert re.search(match, rec.warnings[0]), rec.warnings


def test_iq_driver_logs_the_warnings(tmp_path, caplog):
    plan = make_plan()
    meta = _meta({"core:sample_rate": plan.sample_rate_hz}, drop=["core:version"])
    with caplog.at_level(logging.WARNING, logger="brimline"):
        with IqDriver(plan=plan, path=str(_files(tmp_path, meta, _cf32(N)))):
            pass
    assert any("no core:version" in r.getMessage() for r in caplog.records)


def test_a_folder_is_named(tmp_path):
    (tmp_path / "r.sigmf-meta").write_text(_meta())
    (tmp_path / "r.sigmf-data").mkdir()
    with pytest.raises(SourceError, match=r"r.sigmf-data: is a folder"):
        read_sigmf(tmp_path / "r")
    with pytest.raises(SourceError, match=r"is a folder; give a recording as NAME"):
        read_sigmf(tmp_path)


@pytest.mark.parametrize("rms", [3.0, 300.0, 3000.0, 9000.0, 16000.0, 30000.0])
def test_real_ci16_signals_are_not_taken_for_float_data(tmp_path, rms):
    """The datatype test must not refuse genuine int16 recordings: Gaussian noise from a few
    counts up to a heavily clipped level, and a signal on the Q axis only."""
    read_sigmf(_files(tmp_path, _meta({"core:datatype": "ci16_le"}), _ci16(N, rms=rms)))
    q_only = np.zeros((N, 2), "<i2")
    q_only[:, 1] = np.where(np.arange(N) % 2, 16000, -16000)
    read_sigmf(_files(tmp_path, _meta({"core:datatype": "ci16_le"}), q_only.tobytes()))


def test_non_finite_samples_past_the_checked_head_are_zeroed_and_counted(tmp_path):
    plan = make_plan()
    x = np.frombuffer(_cf32(70_000), np.complex64).copy()
    x[68_000:68_100] = np.nan
    write_sigmf(tmp_path / "n", x, sample_rate_hz=plan.sample_rate_hz)
    with IqDriver(plan=plan, path=str(tmp_path / "n")) as drv:
        list(drv.frames())
    assert drv.counters["non_finite_samples"] == 100


def test_a_device_as_meta_file_is_read_bounded(tmp_path):
    (tmp_path / "z.sigmf-meta").symlink_to("/dev/zero")
    with pytest.raises(SourceError, match=r"z.sigmf-meta: larger than \d+ bytes"):
        read_sigmf(tmp_path / "z")


@pytest.mark.parametrize("kwargs, match", [
    ({"default_bits": 99}, r"driver.iq.default_bits=99 must be in \[0, link.max_bits=10\]"),
    ({"max_frames": -1}, r"driver.iq.max_frames=-1 must be >= 1"),
])
def test_driver_arguments_are_checked_before_the_file(tmp_path, kwargs, match):
    with pytest.raises(ConfigError, match=match):
        IqDriver(plan=make_plan(), path=str(tmp_path / "absent"), **kwargs)
