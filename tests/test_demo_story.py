"""The demo's story (config/demo.yaml, told in the README under ``brimline run``), checked.

The demo is run as a user runs it (``brimline run --duration 25 --log-json``) with changes that
do not touch its maps: the simulator in fast mode (lockstep: seeded, so the same maps byte for
byte on every run, whatever the machine does meanwhile), every socket on a free port, and a
recording of the maps. The scenario's times are read from the config, and the assertions name
kinds, causes and windows of link time around its events, not exact counts or bit totals that
a small tuning of the change control would move:

* the first map at once; an upgrade once tracking has settled, before the fade;
* an emergency downshift at the fade; after the fade clears, a map that carries more bits
  (and whose reason reads as a gain);
* the beacon: a reload, not a bit swap, naming the limit that ruled the swap out, with bits
  lost and tones around the beacon emptied;
* the dip: a repair whose worst tone lies in the dip;
* the drift: a common-mode reload ("band fell") with fewer bits, after the dip.

The scenario is invented (the Kestrel Ridge hut to Lowmarsh mast link) and seeded.
"""

from __future__ import annotations

import io
import json
import re
import sys
from pathlib import Path

import numpy as np
import pytest

from brimline.daemon.commands.cli import main
from brimline.daemon.runtime.config import load_config
from brimline.daemon.runtime.service import Service
from brimline.daemon.wire import codec
from brimline.daemon.wire.recording import RecordSetReader

DEMO = Path(__file__).resolve().parents[1] / "config" / "demo.yaml"
DURATION_S = 25.0
SWAP_LIMITS = {"swap_tones", "swap_loss", "swap_power", "swap_off"}


def _fast_copy(folder: Path) -> Path:
    """config/demo.yaml in fast (lockstep) mode, on free ports, recording its maps."""
    text = DEMO.read_text()
    text, n = re.subn(r"(\n    realtime:) true ", r"\1 false", text)
    assert n == 1, "the demo's driver.sim.realtime line moved"
    text = re.sub(r"tcp://127\.0\.0\.1:\d+", "tcp://127.0.0.1:0", text)
    text, n = re.subn(r"\nrecord:\n  path: null\n",
                      f"\nrecord:\n  path: {folder / 'maps.brlog'}\n  topics: [map]\n", text)
    assert n == 1, "the demo's record section moved"
    folder.mkdir()
    path = folder / "demo-fast.yaml"
    path.write_text(text)
    return path


def _recorded_maps(path: Path) -> list:
    with RecordSetReader(path) as reader:
        return [m for topic, m in reader if topic == "map"]


def _map_bytes(path: Path) -> list[bytes]:
    """Each recorded map as the codec puts it on the wire."""
    return [b"".join(bytes(f) for f in codec.encode(codec.TOPIC_MAP, m))
            for m in _recorded_maps(path)]


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    """One run of the demo through the CLI: its JSON log, its printed summary, its maps."""
    folder = tmp_path_factory.mktemp("demo") / "cli"
    cfg = _fast_copy(folder)
    capture = pytest.MonkeyPatch()
    out, err = io.StringIO(), io.StringIO()
    capture.setattr(sys, "stdout", out)
    capture.setattr(sys, "stderr", err)
    try:
        code = main(["run", "--config", str(cfg), "--duration", str(DURATION_S), "--log-json"])
    finally:
        capture.undo()
    assert code == 0, err.getvalue()
    lines = [json.loads(line) for line in err.getvalue().splitlines() if line.startswith("{")]
    return {"config": load_config(cfg), "log": lines, "stdout": out.getvalue(),
            "maps": _recorded_maps(folder / "maps.brlog"),
            "bytes": _map_bytes(folder / "maps.brlog"), "folder": folder}


def _events(demo, name):
    return [rec for rec in demo["log"] if rec.get("event") == name]


def _first_from(maps, t_s, *, within_s):
    """The first map logged at or after ``t_s``; it must come within ``within_s``."""
    later = [m for m in maps if m["link_time_s"] >= t_s - 1e-9]
    assert later, f"no map after {t_s} s"
    assert later[0]["link_time_s"] < t_s + within_s, later[0]
    return later[0]


def _worst_tone(reason: str) -> int:
    return int(re.search(r"worst at tone (-?\d+)", reason).group(1))


class TestTheStory:
    def test_a_map_line_per_map_with_its_fields(self, demo):
        maps = _events(demo, "map")
        assert [m["seq"] for m in maps] == [m.seq for m in demo["maps"]]
        for rec, m in zip(maps, demo["maps"]):
            assert rec["link_time_s"] == pytest.approx(m.created_s)
            assert rec["bits_after"] == m.total_bits and rec["time"]  # wall time alongside
            assert rec["kind"] in ("reload", "bit_swap", "emergency") and rec["cause"]
            assert rec["margin_target_db"] == demo["config"].loading.margin_db
            # a bit swap repairs only the tones below the downshift margin and keeps the
            # others as they were: its margin lies between that and the target
            floor = rec["margin_target_db"] + (demo["config"].change.downshift_margin_db
                                               if rec["kind"] == "bit_swap" else 0.0)
            assert rec["margin_achieved_db"] >= floor - 0.05
            assert f"at link time {rec['link_time_s']:.2f} s" in rec["message"]
        assert [m["bits_before"] for m in maps[1:]] == [m["bits_after"] for m in maps[:-1]]

    def test_the_duration_is_link_time(self, demo):
        frames = int(DURATION_S * demo["config"].driver.sim.frame_rate_hz)
        assert f"frames          {frames} received, {frames} used" in demo["stdout"]
        end = _events(demo, "run_end")
        assert len(end) == 1 and len(end[0]["maps"]) == len(demo["maps"])
        assert all(m.created_s < DURATION_S for m in demo["maps"])

    def test_the_summary_has_the_timeline(self, demo):
        rows = [line for line in demo["stdout"].splitlines()
                if re.match(r"\s+\d+\.\d\d s  \w+", line)]
        assert len(rows) == len(demo["maps"])
        for row, m in zip(rows, demo["maps"]):
            assert f"{m.created_s:.2f} s" in row and m.reason in row

    def test_first_map_then_an_upgrade_before_the_fade(self, demo):
        maps = _events(demo, "map")
        fade = demo["config"].driver.sim.events[0]
        assert (maps[0]["kind"], maps[0]["cause"]) == ("reload", "first_map")
        assert maps[0]["link_time_s"] < 0.1
        before = [m for m in maps if 0 < m["link_time_s"] < fade.start_s]
        ups = [m for m in before if m["cause"] == "upgrade"]
        assert ups and ups[0]["bits_after"] > ups[0]["bits_before"]
        assert ups[0]["reason"].startswith("upgrade: +")

    def test_an_emergency_at_the_fade(self, demo):
        fade = demo["config"].driver.sim.events[0]
        m = _first_from(_events(demo, "map"), fade.start_s, within_s=0.5)
        assert (m["kind"], m["cause"]) == ("emergency", "emergency_tones")
        assert m["bits_after"] < m["bits_before"]
        tone = _worst_tone(m["reason"])
        assert fade.first_tone <= tone <= fade.last_tone

    def test_more_bits_once_the_fade_clears(self, demo):
        fade = demo["config"].driver.sim.events[0]
        up_dwell_s = demo["config"].change.up_dwell_s
        m = _first_from(_events(demo, "map"), fade.stop_s, within_s=up_dwell_s + 1.0)
        assert m["bits_after"] > m["bits_before"]
        # however the change control came to it, the words say it gained
        gain = m["bits_after"] - m["bits_before"]
        assert m["reason"].startswith((f"upgrade: {gain:+d} bits", f"reload: {gain:+d} bits"))

    def test_the_beacon_is_a_reload_that_names_the_limit(self, demo):
        sim = demo["config"].driver.sim
        start = _first_from(_events(demo, "map"), sim.interferer_start_s, within_s=0.5)
        # the beacon's maps: those of its first half second (its skirts can come a map
        # before the tones under it, which the estimator confirms a few frames later)
        burst = [m for m in _events(demo, "map")
                 if start["link_time_s"] <= m["link_time_s"] < sim.interferer_start_s + 0.5]
        # the first is a reload that names the limit; a tone of the beacon's skirt that
        # sinks a few frames later may be repaired on its own (a bit swap), near the beacon
        assert burst[0]["kind"] == "reload" and burst[0]["cause"] in SWAP_LIMITS, burst[0]
        assert "bit swap" in burst[0]["reason"]
        for m in burst[1:]:
            assert m["kind"] in ("reload", "bit_swap"), m
            assert abs(_worst_tone(m["reason"]) - sim.interferer_tone) < 15, m
        assert burst[-1]["bits_after"] < start["bits_before"]
        assert any(abs(_worst_tone(m["reason"]) - sim.interferer_tone) < 15 for m in burst)
        # the tones around the beacon are emptied; what goes on the README is checked here
        before = next(x for x in demo["maps"] if x.seq == start["seq"] - 1)
        after = next(x for x in demo["maps"] if x.seq == burst[-1]["seq"])
        emptied = before.tone_index[(before.bits > 0) & (after.bits == 0)]
        assert emptied.size >= 10
        assert np.all(np.abs(emptied - sim.interferer_tone) < 15)

    def test_the_dip_is_repaired_where_it_is(self, demo):
        dip = demo["config"].driver.sim.events[1]
        m = _first_from(_events(demo, "map"), dip.start_s, within_s=0.5)
        assert m["kind"] in ("bit_swap", "reload") and m["kind"] != "emergency"
        assert dip.first_tone <= _worst_tone(m["reason"]) <= dip.last_tone
        if m["kind"] == "reload":
            assert m["cause"] in SWAP_LIMITS

    def test_the_drift_is_one_common_mode_reload_at_a_time(self, demo):
        dip = demo["config"].driver.sim.events[1]
        late = [m for m in _events(demo, "map") if m["link_time_s"] > dip.stop_s]
        falls = [m for m in late if m["cause"] == "common_mode"]
        assert falls, late
        assert all(m["reason"].startswith("reload: band fell")
                   and m["bits_after"] < m["bits_before"] for m in falls)
        # nothing else late but an upgrade (the dip's tones coming back)
        assert {m["cause"] for m in late} <= {"common_mode", "upgrade"}, late

    def test_the_same_maps_byte_for_byte_on_another_run(self, demo, tmp_path):
        cfg = load_config(_fast_copy(tmp_path / "again"))
        with Service(cfg) as svc:
            svc.run(DURATION_S)
        assert _map_bytes(tmp_path / "again" / "maps.brlog") == demo["bytes"]
