"""Single-radio loopback (``driver.radio.transmit: true``): the daemon's radio transmits with
``brimline tx``'s loop, following the daemon's own maps.

Run on the emulated radio at real-time pace; the tests assert what the received headers say,
never how long anything took (the deadlines only catch a hang).
"""

from __future__ import annotations

import socket
from pathlib import Path

import pytest
from protocol_helpers import until

from brimline.daemon.net.publisher import MapPublisher
from brimline.daemon.runtime.assemble import build_core
from brimline.daemon.runtime.config import load_config
from brimline.daemon.runtime.loopback import LoopbackTransmitter
from brimline.daemon.runtime.service import Service
from brimline.daemon.runtime.status import build_status
from brimline.daemon.runtime.transmitter import TX_STATUS_TYPE

ROOT = Path(__file__).resolve().parents[1]
ANY = "tcp://127.0.0.1:0"


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def loopback_config(**overrides):
    """The rehearsal's receiving side as a one-radio loopback on a free air port."""
    keys = {"driver.radio.transmit": True, "driver.radio.tx_attenuation_db": 10.0,
            "tx.frame_rate_hz": 25.0, "tx.backoff_db": 12.0,
            "emulated.air_endpoint": f"tcp://127.0.0.1:{free_port()}",
            "publish.map_endpoint": ANY, "publish.snapshot_endpoint": ANY,
            "publish.ack_endpoint": ANY, "status.endpoint": ANY,
            # a long lead: a busy test machine never makes a map late
            "service.lead_frames": 25,
            # a fading channel and quick change control, so that maps keep coming
            "emulated.profile": "epa", "emulated.doppler_hz": 2.0, "emulated.seed": 11,
            "change.up_dwell_s": 0.2, "change.max_maps_per_s": 8.0}
    keys.update(overrides)
    return load_config(ROOT / "config" / "rehearsal-rx.yaml", overrides=keys)


@pytest.fixture
def published(monkeypatch):
    """Every map any MapPublisher sends in this test, in order."""
    maps = []
    real = MapPublisher.publish

    def publish(self, load_map):
        maps.append(load_map)
        return real(self, load_map)
    monkeypatch.setattr(MapPublisher, "publish", publish)
    return maps


def in_force(maps, frame: int) -> int:
    """Sequence number of the newest map naming ``frame`` or an earlier one (-1: default)."""
    best = None
    for m in maps:
        if m.effective_frame <= frame and (best is None or m.seq > best.seq):
            best = m
    return -1 if best is None else best.seq


def test_loopback_follows_the_maps_and_switches_at_the_named_frame(published):
    """Every frame the daemon's receiver decodes carries, in its header, the map in force at its
    frame counter by the maps the daemon published (default map before the first); the counter
    advances; several maps are switched to; the transmitter's status rides in the daemon's."""
    cfg = loopback_config()
    heard = []  # (frame counter, map seq in the header)
    with Service(cfg) as svc:
        process = svc.process

        def taking(estimate, **kw):
            if estimate.header_ok:
                heard.append((estimate.frame, estimate.map_seq_seen))
            return process(estimate, **kw)
        svc.process = taking
        svc.start()
        assert until(lambda: len({s for _, s in heard if s >= 0}) >= 3,
                     step=lambda: svc.step(0.05), timeout_s=180.0)
        st = svc.publish_status()
    tx = st["transmitter"]
    assert tx["type"] == TX_STATUS_TYPE and tx["state"] == "following"
    assert tx["device"] == "running" and tx["maps_applied"] >= 3
    assert "transmitter_down" not in st["alarms"]
    frames = [k for k, _ in heard]
    assert frames == sorted(frames) and len(set(frames)) == len(frames)
    wrong = [(k, s, in_force(published, k)) for k, s in heard if s != in_force(published, k)]
    assert not wrong, wrong[:5]


def test_transmitter_that_cannot_start_is_shown_as_failed():
    """No device for the transmit side (the emulated radio gone for good): the loopback
    transmitter stops with the one-line reason naming driver.radio.uri, its status says failed,
    and the daemon's status raises transmitter_down."""
    cfg = loopback_config(**{"emulated.vanish_after_s": 0.0, "emulated.vanish_for_s": 1e9})
    plan = build_core(cfg)[0]
    tx = LoopbackTransmitter(cfg, plan, {"maps": ANY, "snapshots": ANY, "acks": ANY})
    with tx:
        tx.start()
        assert until(lambda: tx.error is not None, timeout_s=60.0)
        st = tx.status()
    assert st["state"] == "failed"
    assert st["error"].startswith("driver.radio.uri=emulated:rx: emulated radio: ")
    assert "transmitter_down" in build_status(
        time_s=0.0, epoch="e", driver={"name": "radio", "state": "running"}, frames={},
        estimate_age_s=None, tone_index=None, snr_db=None, transmitter=st)["alarms"]


def test_frame_rate_the_loopback_cannot_keep_is_one_line(tmp_path, capsys):
    """The loopback's frame rate is the tx: section's, and the config's own check of it
    against the frame length holds for a daemon's file (one line naming the key, exit 2)."""
    from brimline.daemon.commands.cli import main

    cfg = tmp_path / "loop.yaml"
    cfg.write_text((ROOT / "config" / "rehearsal-rx.yaml").read_text().replace(
        "    default_bits: 2\n", "    default_bits: 2\n    transmit: true\n", 1)
        + "\ntx:\n  frame_rate_hz: 500.0\n")
    assert main(["run", "--config", str(cfg), "--check"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "tx.frame_rate_hz=500.0" in err[0], err
