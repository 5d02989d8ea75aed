"""The browser view's server: status in over ZeroMQ, page and WebSocket updates out.

Pages are played by aiohttp WebSocket clients here; a real browser is in
test_lookout_browser.py. Timeouts only catch a hang.
"""

from __future__ import annotations

import asyncio
import socket

import aiohttp
import pytest
import zmq
from protocol_helpers import ANY_PORT
from test_lookout_data import _status

from brimline.daemon.commands.cli import main
from brimline.daemon.errors import InputError
from brimline.daemon.net.curve import make_keypair
from brimline.daemon.net.publisher import MapPublisher, StatusPublisher
from brimline.daemon.views.lookout import STATIC_FILES, Lookout
from brimline.daemon.wire import codec

HANG_S = 30.0


async def _publish_until(view: Lookout, publish, condition) -> None:
    """Publish (PUB/SUB joins late: repeat) until ``condition()``; fail only on a hang."""
    loop = asyncio.get_running_loop()
    deadline = loop.time() + HANG_S
    while not condition():
        assert loop.time() < deadline, f"no status reached the view: {view.status_counts()}"
        publish()
        await asyncio.sleep(0.05)


async def _next(ws, kind: str) -> dict:
    while True:
        msg = await asyncio.wait_for(ws.receive_json(), HANG_S)
        if msg["kind"] == kind:
            return msg


@pytest.fixture
def publisher(ctx):
    with StatusPublisher(endpoint=ANY_PORT, context=ctx) as pub:
        yield pub


def test_pages_get_a_snapshot_then_each_status(publisher):
    async def scenario():
        with Lookout(publisher.endpoint, port=0) as view:
            async with aiohttp.ClientSession() as http:
                async with http.ws_connect(view.url + "stream") as ws:
                    snap = await _next(ws, "snapshot")
                    assert snap["frame"] is None and snap["points"] == []
                    assert snap["settings"]["endpoint"] == publisher.endpoint
                    await _publish_until(view, lambda: publisher.publish(_status(time_s=1.0)),
                                         lambda: view.counters["received"] > 0)
                    first = await _next(ws, "update")
                    assert first["frame"]["band"]["tone_first"] == -50
                    assert first["frame"]["map"]["seq"] == 12
                    publisher.publish(_status(time_s=2.0, seq=13, kind="reload"))
                    while True:
                        update = await _next(ws, "update")
                        if update["frame"]["map"]["seq"] == 13:
                            break
                    assert update["point"]["t"] == 2.0
                    assert [m["label"] for m in update["marks"]] == ["seq 13 reload"]
                    assert update["view"]["pages"] == 1
                # a page opened later starts from the history
                async with http.ws_connect(view.url + "stream") as late:
                    snap = await _next(late, "snapshot")
                    assert snap["frame"]["map"]["seq"] == 13
                    assert [p["t"] for p in snap["points"]][-1] == 2.0
                    assert {m["label"] for m in snap["marks"]} >= {"seq 12 emergency",
                                                                   "seq 13 reload"}
    asyncio.run(scenario())


def test_bad_messages_are_dropped_and_counted(ctx, publisher):
    raw = ctx.socket(zmq.PUB)
    raw.setsockopt(zmq.LINGER, 0)
    raw.bind(ANY_PORT)
    raw_ep = raw.getsockopt(zmq.LAST_ENDPOINT).decode()

    async def scenario():
        with Lookout(raw_ep, port=0) as view:
            await _publish_until(view, lambda: raw.send_multipart([b"status", b"not json"]),
                                 lambda: view.drops.counts().get("status"))
            bad = _status()
            bad["band"]["snr_db"] = "lots"
            good = _status(time_s=3.0)
            await _publish_until(view, lambda: _send_dict(raw, bad),
                                 lambda: "status_shape" in view.drops.counts()["status"])
            await _publish_until(view, lambda: _send_dict(raw, good),
                                 lambda: view.counters["received"] > 0)
            counts = view.status_counts()
            assert counts["dropped"]["status_shape"] >= 1
            assert sum(counts["dropped"].values()) > counts["dropped"]["status_shape"]
            async with aiohttp.ClientSession() as http:
                async with http.get(view.url + "snapshot.json") as resp:
                    snap = await resp.json()
            assert snap["frame"]["time_s"] == 3.0  # the good one after the bad ones
            assert snap["view"]["dropped"]["status_shape"] >= 1
    try:
        asyncio.run(scenario())
    finally:
        raw.close(linger=0)


def _send_dict(sock, record: dict) -> None:
    sock.send_multipart(codec.encode(codec.TOPIC_STATUS, record))


def test_the_page_and_its_files_are_served_from_the_package(publisher):
    async def scenario():
        with Lookout(publisher.endpoint, port=0) as view:
            async with aiohttp.ClientSession() as http:
                async with http.get(view.url) as resp:
                    assert resp.status == 200
                    page = await resp.text()
                    assert "/static/lookout.js" in page and "<canvas" in page
                    assert resp.headers["Content-Security-Policy"].startswith("default-src 'self'")
                for name in STATIC_FILES:
                    if name == "index.html":
                        continue
                    async with http.get(view.url + "static/" + name) as resp:
                        assert resp.status == 200
                        body = await resp.text()
                        assert "Apache-2.0" in body
                        assert "http://" not in body and "https://" not in body  # no network
                for missing in ("static/nothing.js", "static/index.html", "nowhere"):
                    async with http.get(view.url + missing) as resp:
                        assert resp.status == 404
    asyncio.run(scenario())


def test_pages_beyond_the_limit_are_refused(publisher):
    async def scenario():
        with Lookout(publisher.endpoint, port=0, max_pages=1) as view:
            async with aiohttp.ClientSession() as http:
                async with http.ws_connect(view.url + "stream") as ws:
                    await _next(ws, "snapshot")
                    with pytest.raises(aiohttp.WSServerHandshakeError) as info:
                        await http.ws_connect(view.url + "stream")
                    assert info.value.status == 503
                    assert view.status_counts()["pages_refused"] == 1
    asyncio.run(scenario())


def test_curve_keys_as_for_watch(tmp_path, ctx):
    """An authorised viewer gets the CURVE-protected stream; one with another key gets none."""
    make_keypair(tmp_path / "daemon", "daemon")
    make_keypair(tmp_path / "clients", "viewer")
    make_keypair(tmp_path / "strangers", "mallory")
    with MapPublisher(map_endpoint=ANY_PORT, snapshot_endpoint=ANY_PORT, ack_endpoint=None,
                      linger_s=0, context=ctx,
                      curve_secret_key=str(tmp_path / "daemon/daemon.key_secret"),
                      curve_clients_dir=str(tmp_path / "clients")) as maps, \
            StatusPublisher(endpoint=ANY_PORT, curve=maps.curve) as pub:
        server_key = tmp_path / "daemon/daemon.key"
        with Lookout(pub.endpoint, port=0, curve_server_key=server_key,
                     curve_client_key=tmp_path / "clients/viewer.key_secret") as good, \
                Lookout(pub.endpoint, port=0, curve_server_key=server_key,
                        curve_client_key=tmp_path / "strangers/mallory.key_secret") as stranger:
            async def scenario():
                await _publish_until(good, lambda: pub.publish(_status()),
                                     lambda: good.counters["received"] > 3)
            asyncio.run(scenario())
            assert stranger.counters["received"] == 0


def test_one_key_file_alone_is_refused():
    with pytest.raises(InputError, match="CURVE needs both"):
        Lookout("tcp://127.0.0.1:7343", curve_server_key="daemon.key")


def test_a_taken_port_is_one_input_error(publisher):
    with socket.socket() as taken:
        taken.bind(("127.0.0.1", 0))
        taken.listen(1)
        port = taken.getsockname()[1]
        with pytest.raises(InputError, match=f"cannot serve on 127.0.0.1:{port}"):
            Lookout(publisher.endpoint, port=port).start()


def test_close_is_idempotent_and_start_after_close_is_refused(publisher):
    view = Lookout(publisher.endpoint, port=0).start()
    view.close()
    view.close()
    with pytest.raises(RuntimeError, match="closed"):
        view.start()


class TestCommand:
    @pytest.mark.parametrize("argv,message", [
        (["--port", "70000"], "--port=70000 must be 0..65535"),
        (["--snr-scale", "40:5"], "--snr-scale='40:5' must be LOW:HIGH in dB with LOW < HIGH"),
        (["--snr-scale", "nan:5"], "--snr-scale='nan:5' must be LOW:HIGH"),
        (["--snr-scale", "0,40"], "--snr-scale='0,40' must be LOW:HIGH"),
        (["--duration", "-1"], "--duration=-1.0 must be a positive number"),
        (["--endpoint", "nowhere"], "--endpoint='nowhere' must be a ZeroMQ address"),
        (["--endpoint", "tcp://"], "--endpoint='tcp://'"),
        (["--daemon-key", "a.key"], "--daemon-key and --own-key go together"),
        (["--daemon-key", "missing.key", "--own-key", "missing.key_secret"], "missing.key"),
        (["--host", "bad host"], "--host='bad host' must be a host name or address"),
    ])
    def test_bad_flags_are_one_line_and_exit_2(self, argv, message, capsys):
        assert main(["lookout", "--port", "0", "--duration", "5", *argv]) == 2
        err = capsys.readouterr().err
        assert err.count("\n") == 1 and message in err and "Traceback" not in err

    def test_a_taken_port_is_one_line_and_exit_2(self, capsys):
        with socket.socket() as taken:
            taken.bind(("127.0.0.1", 0))
            taken.listen(1)
            port = taken.getsockname()[1]
            assert main(["lookout", "--port", str(port), "--duration", "5"]) == 2
        err = capsys.readouterr().err
        assert err.count("\n") == 1 and f"cannot serve on 127.0.0.1:{port}" in err

    def test_it_serves_until_the_duration_and_says_where(self, capsys):
        assert main(["lookout", "--port", "0", "--duration", "0.3"]) == 0
        out = capsys.readouterr().out
        assert out.startswith("brimline lookout: open http://127.0.0.1:")

    def test_a_host_other_hosts_reach_is_warned_about(self, capsys):
        assert main(["lookout", "--host", "0.0.0.0", "--port", "0", "--duration", "0.2"]) == 0
        assert "the page has no login" in capsys.readouterr().err

    def test_help_ends_with_the_rf_caution(self, capsys):
        with pytest.raises(SystemExit):
            main(["lookout", "--help"])
        assert "RF caution" in capsys.readouterr().out


class TestTake:
    """What the view does with each message, without sockets (``Lookout.take``)."""

    def _frames(self, record):
        return [bytes(f) for f in codec.encode(codec.TOPIC_STATUS, record)]

    def test_gaps_in_status_seq_are_counted_as_missed(self):
        view = Lookout("tcp://127.0.0.1:7343", port=0)
        for seq in (0, 1, 4, 5):
            assert view.take(self._frames({**_status(time_s=float(seq)), "status_seq": seq}))
        assert view.status_counts()["missed"] == 2 and view.status_counts()["received"] == 4

    def test_other_dicts_on_the_stream_are_ignored_not_dropped(self):
        view = Lookout("tcp://127.0.0.1:7343", port=0)
        assert view.take(self._frames({"type": "tx_status", "seq": 3})) is None
        assert view.counters["ignored"] == 1 and view.status_counts()["dropped"] == {}

    def test_undecodable_and_misshapen_messages_are_counted_by_reason(self):
        view = Lookout("tcp://127.0.0.1:7343", port=0)
        assert view.take([b"status", b"\x00garbage"]) is None
        bad = _status()
        bad["map"] = "seq 3"
        assert view.take(self._frames(bad)) is None
        dropped = view.status_counts()["dropped"]
        assert dropped["status_shape"] == 1 and sum(dropped.values()) == 2
        assert view.status_counts()["received"] == 0
