"""``brimline run``: --check, bad configs, a bounded run's summary, and SIGTERM shutdown."""

from __future__ import annotations

import json
import logging
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
import zmq
from _service_fakes import ScriptedDriver, loopback_config

from brimline.daemon.commands.cli import main
from brimline.daemon.commands.run import JsonLogFormatter, end_summary
from brimline.daemon.core.controller import Change
from brimline.daemon.wire import codec
from brimline.daemon.wire.recording import RecordWriter
from brimline.daemon.wire.state import StateStore

ROOT = Path(__file__).resolve().parents[1]
SHIPPED = sorted((ROOT / "config").glob("*.yaml"))


def _recording(path: Path, frames: int = 300, frame_s: float = 0.01) -> Path:
    from brimline.drivers.link.frame import make_plan

    plan = make_plan(**loopback_config().link.model_dump())
    with ScriptedDriver(plan, frames=frames, frame_s=frame_s,
                        fades=[(frames * frame_s / 2, 20, 60, 15.0)]) as drv, \
            RecordWriter(path, topics=["estimate"]) as w:
        for e in drv.frames():
            w.write("estimate", e)
    return path


def _config(tmp_path: Path, recording: Path, *, realtime: bool = False, record: str | None = None,
            state_path: str = "state.bin") -> Path:
    text = f"""
driver:
  kind: replay
  replay:
    path: {recording.name}
    realtime: {str(realtime).lower()}
publish:
  map_endpoint: tcp://127.0.0.1:0
  snapshot_endpoint: tcp://127.0.0.1:0
  ack_endpoint: tcp://127.0.0.1:0
  linger_s: 0.0
status:
  endpoint: tcp://127.0.0.1:0
  rate_hz: 10.0
service:
  state_path: {state_path}
"""
    if record is not None:
        text += f"record:\n  path: {record}\n"
    p = tmp_path / "run.yaml"
    p.write_text(text)
    return p


@pytest.mark.parametrize("path", SHIPPED, ids=[p.name for p in SHIPPED])
def test_shipped_configs_pass_check(path, capsys, monkeypatch):
    if "kind: radio" in path.read_text():  # --check opens the radio: a stand-in answers
        _stand_in_pyadi(monkeypatch)
    assert main(["run", "--config", str(path), "--check"]) == 0
    out = capsys.readouterr().out.strip().splitlines()
    assert len(out) == 1 and ": OK: driver " in out[0]


def _stand_in_pyadi(monkeypatch, *, absent_uri=None):
    """pyadi-iio replaced by a module whose Pluto opens unless its URI is ``absent_uri``."""
    import types

    from brimline.drivers.sources import radio

    class Pluto:
        def __init__(self, uri):
            if uri == absent_uri:
                raise ConnectionRefusedError(111, "Connection refused")

    monkeypatch.setattr(radio, "load_adi", lambda: types.SimpleNamespace(Pluto=Pluto))


def test_radio_check_without_pyadi_iio_is_the_install_hint(capsys, monkeypatch):
    import builtins
    import sys

    real_import = builtins.__import__

    def no_adi(name, *args, **kwargs):
        if name == "adi":
            raise ImportError("No module named 'adi'")
        return real_import(name, *args, **kwargs)

    monkeypatch.setattr(builtins, "__import__", no_adi)
    monkeypatch.delitem(sys.modules, "adi", raising=False)
    radio_yaml = next(p for p in SHIPPED if p.name == "radio.yaml")
    assert main(["run", "--config", str(radio_yaml), "--check"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "install with pip install 'brimline[sdr]'" in err[0]


def test_radio_check_with_no_device_at_the_uri_names_it(capsys, monkeypatch):
    _stand_in_pyadi(monkeypatch, absent_uri="ip:192.168.2.1")
    radio_yaml = next(p for p in SHIPPED if p.name == "radio.yaml")
    assert main(["run", "--config", str(radio_yaml), "--check"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "driver.radio.uri=ip:192.168.2.1: no device answers" in err[0]


def test_the_three_configs_are_shipped():
    assert {p.name for p in SHIPPED} >= {"demo.yaml", "replay.yaml", "radio.yaml"}


@pytest.mark.parametrize("text, match", [
    ("fallback:\n  power_db: 2.0\n", r"line 2: fallback.power_db=2.0: .*loading.budget_db"),
    ("driver:\n  kind: replay\n", r"line 2: driver.kind='replay': needs a driver.replay"),
    ("service:\n  lead_frames: -1\n", r"line 2: service.lead_frames=-1"),
    ("fallback:\n  bits: 9\n", r"fallback.bits=9: is not one of loading.bits"),
])
def test_bad_config_is_one_line_and_exit_2(tmp_path, capsys, text, match):
    import re

    p = tmp_path / "bad.yaml"
    p.write_text(text)
    assert main(["run", "--config", str(p), "--check"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and re.search(match, err[0]), err


def test_missing_replay_file_fails_check(tmp_path, capsys):
    cfg = _config(tmp_path, tmp_path / "absent.brlog")
    assert main(["run", "--config", str(cfg), "--check"]) == 2
    assert "no such recording" in capsys.readouterr().err


def test_replay_run_prints_live_lines_and_summary(tmp_path, capsys):
    cfg = _config(tmp_path, _recording(tmp_path / "est.brlog"))
    assert main(["run", "--config", str(cfg), "--duration", "10"]) == 0
    out = capsys.readouterr().out
    assert "run summary" in out
    assert "300 received" in out and "maps published" in out
    assert StateStore(tmp_path / "state.bin").load() is not None


def test_sigterm_finishes_with_final_status_and_saved_state(tmp_path):
    rec = _recording(tmp_path / "est.brlog", frames=3000, frame_s=0.01)  # 30 s, paced
    cfg = _config(tmp_path, rec, realtime=True)
    env = {**os.environ, "PYTHONUNBUFFERED": "1"}
    proc = subprocess.Popen([sys.executable, "-m", "brimline.daemon", "run", "--config",
                             str(cfg), "--log-json"], stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True, env=env, cwd=tmp_path)
    ctx = zmq.Context()
    sub = ctx.socket(zmq.SUB)
    sub.setsockopt(zmq.LINGER, 0)
    sub.setsockopt(zmq.SUBSCRIBE, b"status")
    try:
        status_ep = None
        deadline = time.monotonic() + 60
        while status_ep is None and time.monotonic() < deadline:
            line = proc.stderr.readline()
            if not line:
                break
            rec_ = json.loads(line)
            if rec_["message"].startswith("started:"):
                status_ep = rec_["message"].rsplit("status on ", 1)[1].strip()
        assert status_ep, "daemon did not log its endpoints"
        sub.connect(status_ep)
        assert sub.poll(60_000), "no status from the daemon"
        sub.recv_multipart()
        proc.send_signal(signal.SIGTERM)
        final = None
        while sub.poll(60_000):  # ends at the "stopped" status; the timeout catches a hang
            _t, st = codec.decode(sub.recv_multipart())
            final = st
            if st["driver"]["state"] == "stopped":
                break
        out, err = proc.communicate(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait(5)
        sub.close()
        ctx.term()
    assert proc.returncode == 0, err
    assert final is not None and final["driver"]["state"] == "stopped"
    assert "run summary" in out
    saved = StateStore(tmp_path / "state.bin").load()
    assert saved is not None and saved.seq == final["map"]["seq"]
    for line in err.strip().splitlines():  # every log line is one JSON object
        json.loads(line)


def test_value_rejected_by_a_part_is_one_line(tmp_path, capsys):
    p = tmp_path / "bad.yaml"
    p.write_text("change:\n  downshift_margin_db: 2.0\n  upshift_margin_db: 1.0\n")
    assert main(["run", "--config", str(p), "--check"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "downshift_margin_db" in err[0]


def test_relative_paths_are_taken_from_the_config_folder(tmp_path):
    from brimline.daemon.runtime.config import load_config

    sub = tmp_path / "cfg"
    sub.mkdir()
    p = sub / "c.yaml"
    p.write_text("driver:\n  kind: replay\n  replay:\n    path: ../rec/est.brlog\n"
                 "record:\n  path: out.brlog\nservice:\n  state_path: /abs/state.bin\n")
    cfg = load_config(p)
    assert Path(cfg.driver.replay.path) == sub / "../rec/est.brlog"
    assert Path(cfg.record.path) == sub / "out.brlog"
    assert cfg.service.state_path == "/abs/state.bin"


class TestCheckTriesThePaths:
    """``--check`` tries the record and state paths a run would write, and leaves no file."""

    def _check(self, cfg, capsys):
        before = sorted(p.name for p in cfg.parent.rglob("*"))
        code = main(["run", "--config", str(cfg), "--check"])
        out, err = capsys.readouterr()
        assert sorted(p.name for p in cfg.parent.rglob("*")) == before  # nothing left behind
        return code, out.strip().splitlines(), err.strip().splitlines()

    def test_writable_paths_pass(self, tmp_path, capsys):
        cfg = _config(tmp_path, _recording(tmp_path / "est.brlog", frames=20), record="out.brlog")
        code, out, err = self._check(cfg, capsys)
        assert code == 0 and err == [] and len(out) == 1 and ": OK: driver replay" in out[0]

    def test_an_existing_recording_would_be_refused(self, tmp_path, capsys):
        rec = _recording(tmp_path / "est.brlog", frames=20)
        cfg = _config(tmp_path, rec, record="est.brlog")
        code, out, err = self._check(cfg, capsys)
        assert code == 2 and out == []
        assert err == [f"brimline run: error: record.path={rec}: {rec} exists already and a run "
                       f"never overwrites a recording; move it or choose another path"]

    def test_a_left_over_rotated_part_would_be_refused(self, tmp_path, capsys):
        cfg = _config(tmp_path, _recording(tmp_path / "est.brlog", frames=20), record="out.brlog")
        _recording(tmp_path / "out.0001.brlog", frames=5)
        code, _out, err = self._check(cfg, capsys)
        assert code == 2 and len(err) == 1
        assert "record.path=" in err[0] and "out.0001.brlog exists already" in err[0]

    def test_a_missing_record_folder(self, tmp_path, capsys):
        cfg = _config(tmp_path, _recording(tmp_path / "est.brlog", frames=20),
                      record="nowhere/out.brlog")
        code, _out, err = self._check(cfg, capsys)
        assert code == 2 and len(err) == 1
        assert err[0].startswith("brimline run: error: record.path=")
        assert err[0].endswith(f"folder {tmp_path / 'nowhere'} does not exist")

    @pytest.mark.skipif(not hasattr(os, "geteuid") or os.geteuid() == 0,
                        reason="root may write in a read-only folder")
    def test_a_read_only_record_folder(self, tmp_path, capsys):
        ro = tmp_path / "ro"
        ro.mkdir()
        ro.chmod(0o500)
        try:
            cfg = _config(tmp_path, _recording(tmp_path / "est.brlog", frames=20),
                          record="ro/out.brlog")
            code, _out, err = self._check(cfg, capsys)
        finally:
            ro.chmod(0o700)
        assert code == 2 and len(err) == 1 and "cannot create a file in" in err[0]

    def test_a_damaged_state_file(self, tmp_path, capsys):
        (tmp_path / "state.bin").write_bytes(b"")  # what a full disk could leave
        cfg = _config(tmp_path, _recording(tmp_path / "est.brlog", frames=20))
        code, _out, err = self._check(cfg, capsys)
        assert code == 2 and len(err) == 1
        assert err[0] == (f"brimline run: error: service.state_path={tmp_path / 'state.bin'}: "
                          f"{tmp_path / 'state.bin'}: not a brimline state file (bad magic)")

    def test_a_saved_state_loads(self, tmp_path, capsys):
        StateStore(tmp_path / "state.bin").save("0123456789abcdef", 41)
        cfg = _config(tmp_path, _recording(tmp_path / "est.brlog", frames=20))
        code, out, err = self._check(cfg, capsys)
        assert code == 0 and err == [] and len(out) == 1

    def test_every_problem_is_its_own_line(self, tmp_path, capsys):
        rec = _recording(tmp_path / "est.brlog", frames=20)
        (tmp_path / "state.bin").write_bytes(b"")  # what a full disk could leave
        cfg = _config(tmp_path, rec, record="est.brlog")
        code, _out, err = self._check(cfg, capsys)
        assert code == 2 and len(err) == 2
        assert "record.path=" in err[0] and "service.state_path=" in err[1]
        assert err[1].endswith("not a brimline state file (bad magic)")

    def test_a_state_folder_that_cannot_be_made(self, tmp_path, capsys):
        (tmp_path / "plain").write_text("a file where a folder would go")
        cfg = _config(tmp_path, _recording(tmp_path / "est.brlog", frames=20),
                      state_path="plain/sub/state.bin")
        code, _out, err = self._check(cfg, capsys)
        assert code == 2 and len(err) == 1
        assert err[0].startswith(f"brimline run: error: service.state_path={tmp_path}")
        assert "cannot read state" in err[0]

    def test_a_missing_state_folder_is_made_by_the_run(self, tmp_path, capsys):
        """The state file's folders are made at its first save, so --check accepts them
        missing (and makes nothing)."""
        cfg = _config(tmp_path, _recording(tmp_path / "est.brlog", frames=20),
                      state_path="state/brimline/state.bin")
        code, _out, err = self._check(cfg, capsys)
        assert code == 0 and err == [] and not (tmp_path / "state").exists()


def test_a_torn_replay_tail_is_one_json_log_line(tmp_path, capsys):
    """The reader's warning goes through logging, so ``--log-json`` formats it like any other."""
    rec = _recording(tmp_path / "est.brlog", frames=40)
    rec.write_bytes(rec.read_bytes()[:-9])
    cfg = _config(tmp_path, rec)
    assert main(["run", "--config", str(cfg), "--log-json", "--quiet", "--duration", "10"]) == 0
    lines = [json.loads(x) for x in capsys.readouterr().err.strip().splitlines()]
    torn = [x for x in lines if x["logger"] == "brimline.recording"]
    assert len(torn) == 1 and torn[0]["level"] == "warning"
    assert torn[0]["message"].startswith(f"{rec}: record 40 is torn (")


def _iq_config(tmp_path: Path, meta: dict, data: bytes) -> Path:
    (tmp_path / "rec.sigmf-meta").write_text(json.dumps(meta))
    (tmp_path / "rec.sigmf-data").write_bytes(data)
    p = tmp_path / "iq.yaml"
    p.write_text("driver:\n  kind: iq\n  iq:\n    path: rec\n")
    return p


_GLOBAL = {"core:datatype": "cf32_le", "core:sample_rate": 3.84e6, "core:version": "1.0.0"}


@pytest.mark.parametrize("meta, data, match", [
    ({"global": _GLOBAL, "captures": {"core:sample_start": 0}}, bytes(800),
     r"rec.sigmf-meta: captures must be a list of objects"),
    ({"global": _GLOBAL, "captures": [{"core:sample_start": 0, "core:frequency": "2.4e9"}]},
     bytes(800), r"rec.sigmf-meta: captures\[0\].core:frequency='2.4e9'"),
    ({"global": _GLOBAL, "captures": [{"core:sample_start": 500}]}, bytes(800),
     r"captures\[0\].core:sample_start=500 is past the end of the data \(100 samples"),
    ({"global": _GLOBAL}, b"", r"rec.sigmf-data: is empty"),
])
def test_check_opens_and_checks_the_sigmf_recording(tmp_path, capsys, meta, data, match):
    """--check constructs the IQ driver (meta and data checked, nothing received)."""
    import re

    assert main(["run", "--config", str(_iq_config(tmp_path, meta, data)), "--check"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and re.search(match, err[0]), err


def test_check_shows_sigmf_warnings_and_passes(tmp_path, capsys):
    glob = {k: v for k, v in _GLOBAL.items() if k != "core:version"}
    meta = {"global": glob, "annotations": [{"core:sample_start": 0, "core:sample_count": 10**6}]}
    assert main(["run", "--config", str(_iq_config(tmp_path, meta, bytes(800))), "--check"]) == 0
    captured = capsys.readouterr()
    assert ": OK: driver iq" in captured.out
    assert "global has no core:version" in captured.err
    assert "data shorter than its annotations" in captured.err


def test_alias_bomb_fails_check_in_one_line(tmp_path, capsys):
    from test_config import ALIAS_BOMB

    p = tmp_path / "bomb.yaml"
    p.write_text(ALIAS_BOMB)
    assert main(["run", "--config", str(p), "--check"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "aliases expand this node" in err[0], err


def test_failed_source_exits_3(tmp_path, monkeypatch, capsys):
    """The source fails mid-run: the daemon goes on until stopped (here by --duration), then
    exits with EXIT_SOURCE_FAILED, which the README's exit-code list and unit rely on."""
    from brimline.daemon.commands import run as run_cmd
    from brimline.daemon.runtime.service import Service
    from brimline.drivers.link.frame import make_plan

    cfg = _config(tmp_path, _recording(tmp_path / "est.brlog"))

    def failing_service(config):
        plan = make_plan(**config.link.model_dump())
        return Service(config, driver=ScriptedDriver(plan, frames=100, fail_at=20))

    monkeypatch.setattr(run_cmd, "Service", failing_service)
    code = main(["run", "--config", str(cfg), "--duration", "1.0"])
    assert code == run_cmd.EXIT_SOURCE_FAILED == 3
    assert "failed" in capsys.readouterr().out


class TestReadmeUnit:
    """The README's systemd unit (between the snippet markers) against the CLI it starts."""

    @staticmethod
    def unit():
        import configparser
        import re

        text = (ROOT / "README.md").read_text()
        body = re.search(r"<!-- snippet: systemd-unit -->\n```ini\n(.*?)```", text, re.S).group(1)
        parser = configparser.ConfigParser(interpolation=None, strict=True)
        parser.optionxform = str  # systemd keys are case-sensitive
        parser.read_string(body)
        return parser

    def test_exec_start_is_a_valid_run_command(self):
        import shlex

        from brimline.daemon.commands.cli import build_parser

        argv = shlex.split(self.unit()["Service"]["ExecStart"])
        assert Path(argv[0]).name == "brimline"
        args = build_parser().parse_args(argv[1:])  # argparse exits on an unknown flag
        assert args.command == "run" and args.config and not args.check
        assert args.log_json and args.duration is None

    def test_stop_signal_and_exit_codes_match_the_cli(self, tmp_path, capsys):
        """SIGTERM is a signal ``run`` handles; exit 2 (refused restarts) is what a bad config
        gives; exit 3 (a failed source) is not in the refused list, so systemd restarts it."""
        from brimline.daemon.commands import run as run_cmd

        service = self.unit()["Service"]
        assert service["KillSignal"] == "SIGTERM"
        assert "signal.SIGTERM" in Path(run_cmd.__file__).read_text()
        assert service["Restart"] == "on-failure"
        refused = {int(c) for c in service["RestartPreventExitStatus"].split()}
        bad = tmp_path / "bad.yaml"
        bad.write_text("loading:\n  gap_db: nope\n")
        code = main(["run", "--config", str(bad)])
        assert code == 2 and refused == {code}
        assert run_cmd.EXIT_SOURCE_FAILED not in refused


class TestLogFieldsAndTimeline:
    def test_json_lines_carry_the_fields(self):
        rec = logging.LogRecord("brimline.service", logging.INFO, __file__, 1, "map %d", (3,),
                                None)
        rec.fields = {"event": "map", "link_time_s": 4.04, "seq": 3, "kind": "reload",
                      "cause": "swap_tones", "bits_before": 784, "bits_after": 737,
                      "margin_achieved_db": float("nan"), "message": "not this",
                      "time": "not this either"}
        out = json.loads(JsonLogFormatter().format(rec))
        assert out["message"] == "map 3" and out["time"] != "not this either"
        assert (out["event"], out["link_time_s"], out["cause"], out["bits_after"]) == \
            ("map", 4.04, "swap_tones", 737)
        assert out["margin_achieved_db"] is None  # NaN is no JSON
        plain = logging.LogRecord("brimline", logging.INFO, __file__, 1, "hello", (), None)
        assert json.loads(JsonLogFormatter().format(plain))["event"] == "message"

    def test_the_summary_lists_the_maps(self):
        timeline = [Change(0.0, "reload", "reload: first map", 0, "first_map", None, 545),
                    Change(13.04, "reload", "reload: 52 tones below ...", 6, "swap_tones", 784,
                           737)]
        text = end_summary({"maps_published": {"reload": 2}}, timeline)
        assert "link time, kind, bits/symbol before -> after, reason" in text
        assert "      0.00 s  reload        - -> 545   reload: first map" in text
        assert "     13.04 s  reload      784 -> 737   reload: 52 tones below ..." in text
        assert "behind real time" not in text
        many = end_summary({"maps_published": {"reload": 80}}, timeline * 40, behind_s=1.26)
        assert "(the last 50 of 80)" in many and "up to 1.26 s behind real time" in many


def test_duration_counts_the_recording_s_own_time(tmp_path, capsys):
    """A replay of 300 frames 10 ms apart runs 1 s of link time under --duration 1: 100
    frames, however fast the machine reads them."""
    cfg = _config(tmp_path, _recording(tmp_path / "est.brlog", frames=300, frame_s=0.01))
    assert main(["run", "--config", str(cfg), "--duration", "1"]) == 0
    assert "frames          100 received, 100 used" in capsys.readouterr().out
