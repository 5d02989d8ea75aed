"""``brimline replay`` and ``brimline report`` through the command line: outputs, what-if,
``--set`` errors (one line, exit 2), determinism of the JSON Lines."""

from __future__ import annotations

import json
import re
from pathlib import Path

import numpy as np
import pytest
import zmq

from brimline.daemon.commands.cli import main
from brimline.daemon.runtime.config import load_config
from brimline.daemon.runtime.offline import ReplayPublisher, Window, replay_offline, source_epoch
from brimline.daemon.wire import codec
from brimline.daemon.wire.export import read_export

ROOT = Path(__file__).resolve().parents[1]
DEMO = str(ROOT / "replay" / "kestrel_lowmarsh_estimates.brlog")
CONFIG = str(ROOT / "config" / "replay.yaml")


def _run(capsys, *argv):
    code = main(list(argv))
    out, err = capsys.readouterr()
    return code, out, err


def test_replay_prints_the_summary(capsys):
    code, out, err = _run(capsys, "replay", DEMO, "--config", CONFIG, "--to", "5")
    assert code == 0, err
    for word in ("frames", "rejected", "maps", "changes", "rate", "live margin",
                 "below target", "goodput"):
        assert f"  {word}" in out
    assert err == ""  # no progress bar when stderr is not a terminal


def test_jsonl_is_the_same_byte_for_byte(capsys, tmp_path):
    for name in ("a.jsonl", "b.jsonl"):
        code, _out, err = _run(capsys, "replay", DEMO, "--config", CONFIG, "-o",
                               str(tmp_path / name))
        assert code == 0, err
    a, b = (tmp_path / "a.jsonl").read_bytes(), (tmp_path / "b.jsonl").read_bytes()
    assert a == b
    lines = [json.loads(x) for x in a.decode().splitlines()]
    assert lines[0]["type"] == "run" and lines[-1]["type"] == "summary"
    maps = [x for x in lines if x["type"] == "map"]
    assert maps and [m["seq"] for m in maps] == list(range(len(maps)))
    assert lines[-1]["maps"] == len(maps)


def test_export_and_frames_window(capsys, tmp_path):
    code, _out, err = _run(capsys, "replay", DEMO, "--config", CONFIG, "--frames", "100:199",
                           "--export", str(tmp_path / "x.npz"))
    assert code == 0, err
    tables = read_export(tmp_path / "x.npz")
    assert tables.estimates["frame"].tolist() == list(range(100, 200))
    assert tables.estimates["snr_db"].shape == (100, tables.tone_index.size)


def test_what_if_side_by_side(capsys):
    code, out, err = _run(capsys, "replay", DEMO, "--config", CONFIG, "--from", "14",
                          "--against", "fallback.bits=3")
    assert code == 0, err
    assert "first divergence: step" in out and "(3 bits" in out
    assert "fallback.bits=3" in out


@pytest.mark.parametrize("setting, message", [
    ("estimator.tau_s=soon", r"--set estimator.tau_s=soon: estimator.tau_s='soon': "
                             r"Input should be a valid number"),
    ("estimator.tau_z=1", r"--set estimator.tau_z=1: unknown key estimator.tau_z"),
    ("change.up_dwell_s=-1", r"--set change.up_dwell_s=-1: change.up_dwell_s=-1: "
                             r"up_dwell_s=-1.0 must be"),
    ("loading.bits=[0, 3, 1]", r"--set loading.bits=\[0, 3, 1\]: loading.bits="),
    ("fallback.bits=9", r"--set fallback.bits=9: fallback.bits=9: is not one of "
                        r"loading.bits"),
    ("loading.bits.x=1", r"--set loading.bits.x=1: loading.bits is not a section"),
    ("tau_s", r"--set 'tau_s': expected KEY=VALUE"),
    ("estimator.tau_s=[1", r"--set estimator.tau_s=\[1: value is not valid YAML"),
])
def test_bad_set_is_one_line_exit_2(capsys, setting, message):
    code, out, err = _run(capsys, "replay", DEMO, "--config", CONFIG, "--set", setting)
    lines = err.strip().splitlines()
    assert code == 2 and len(lines) == 1, err
    assert lines[0].startswith("brimline replay: error: ")
    assert re.search(message, lines[0]), lines[0]


@pytest.mark.parametrize("argv, message", [
    (["--frames", "a:b"], "--frames='a:b' must be FIRST:LAST"),
    (["--speed", "0"], "--speed=0.0 must be a positive number"),
    (["-o", "x.json"], "-o x.json: name the file .jsonl"),
    (["--from", "3", "--to", "2"], "stop_s=2.0 must be after start_s=3.0"),
])
def test_bad_flags_are_one_line(capsys, argv, message):
    code, _out, err = _run(capsys, "replay", DEMO, *argv)
    assert code == 2 and len(err.strip().splitlines()) == 1 and message in err


def test_missing_recording_is_one_line(capsys, tmp_path):
    code, _out, err = _run(capsys, "replay", str(tmp_path / "none.brlog"))
    assert code == 2 and "no such recording" in err and len(err.strip().splitlines()) == 1


def test_report_command_writes_png_and_csv(capsys, tmp_path):
    pytest.importorskip("matplotlib")
    code, out, err = _run(capsys, "report", DEMO, "--config", CONFIG, "--to", "6", "--at", "4.1",
                          "-o", str(tmp_path / "r.png"), "--export", str(tmp_path / "r.csv"))
    assert code == 0, err
    assert (tmp_path / "r.png").read_bytes().startswith(b"\x89PNG")
    assert read_export(tmp_path / "r.csv").maps["seq"].size >= 1
    code, _out, err = _run(capsys, "report", DEMO, "-o", str(tmp_path / "r.svg"))
    assert code == 2 and "name the report .png, .pdf or .html" in err


def test_published_maps_reach_a_subscriber(ctx):
    """--publish: the maps of an offline run go out on the map socket, in order."""
    config = load_config(CONFIG, overrides=["publish.map_endpoint=tcp://127.0.0.1:0",
                                            "publish.snapshot_endpoint=tcp://127.0.0.1:0",
                                            "publish.ack_endpoint=null",
                                            "status.endpoint=tcp://127.0.0.1:0"])
    with ReplayPublisher(config, source_epoch(DEMO), context=ctx) as pub:
        sub = ctx.socket(zmq.SUB)
        sub.setsockopt(zmq.LINGER, 0)
        sub.setsockopt(zmq.SUBSCRIBE, b"")
        sub.connect(pub.endpoints()["maps"])
        # Heartbeats until the subscription is in place (generous deadline: only a hang).
        for _ in range(2000):
            pub.maps.heartbeat(0.0)
            if sub.poll(5):
                break
        else:
            pytest.fail("no heartbeat within 10 s")
        result = replay_offline(config, DEMO, window=Window(stop_s=5.0), on_step=pub.on_step)
        got = []
        while sub.poll(1000) and len(got) < len(result.maps):
            topic, record = codec.decode(sub.recv_multipart())
            if topic == codec.TOPIC_MAP:
                got.append(record)
        sub.close()
    assert [m.seq for m in got] == [m.seq for m in result.maps]
    assert np.array_equal(got[-1].bits, result.maps[-1].bits)


def test_publisher_keeps_heartbeats_going_while_pacing_waits(ctx):
    config = load_config(CONFIG, overrides=["publish.map_endpoint=tcp://127.0.0.1:0",
                                            "publish.snapshot_endpoint=tcp://127.0.0.1:0",
                                            "publish.ack_endpoint=null",
                                            "publish.heartbeat_s=0.1",
                                            "status.endpoint=tcp://127.0.0.1:0"])
    now = [0.0]

    def sleep(s):
        now[0] += s

    with ReplayPublisher(config, "e" * 16, context=ctx, clock=lambda: now[0],
                         sleep=sleep) as pub:
        beats = []
        send = pub.maps.heartbeat
        pub.maps.heartbeat = lambda t: (beats.append(t), send(t))
        pub.wait(1.0)
    assert now[0] == pytest.approx(1.0)
    assert 8 <= len(beats) <= 12  # every 0.1 s of the fake clock while waiting
