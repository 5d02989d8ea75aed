"""StateStore: atomic saves, damaged files, sequence numbers across restarts."""

import os
import subprocess
import sys
import textwrap

import pytest
import zmq

from brimline.daemon import codec
from brimline.daemon.errors import ProtocolError, StateError
from brimline.daemon.follower import Follower
from brimline.daemon.publisher import MapPublisher
from brimline.daemon.recording import MAGIC
from brimline.daemon.state import StateStore, new_epoch
from protocol_helpers import ANY_PORT, make_map, until, wifi_like_plan


def test_no_file_is_no_state(tmp_path):
    assert StateStore(tmp_path / "state.bin").load() is None


def test_round_trip(tmp_path):
    store = StateStore(tmp_path / "state.bin")
    store.save(make_map(4, epoch="abcd"))
    saved = StateStore(tmp_path / "state.bin").load()
    assert (saved.epoch, saved.seq, saved.next_seq) == ("abcd", 4, 5)
    assert saved.load_map.total_bits == make_map(4).total_bits
    assert os.listdir(tmp_path) == ["state.bin"]  # no temporary files left behind


def test_new_epoch_ids_differ():
    ids = {new_epoch() for _ in range(100)}
    assert len(ids) == 100 and all(len(i) == 16 for i in ids)


class TestDamagedFiles:
    @pytest.fixture
    def path(self, tmp_path):
        p = tmp_path / "state.bin"
        StateStore(p).save(make_map(3))
        return p

    @pytest.mark.parametrize("damage, match", [
        (lambda b: b"", "bad magic"),
        (lambda b: b"hello world, not state", "bad magic"),
        (lambda b: b[:len(MAGIC) + 3], "truncated"),
        (lambda b: b[:-5], "truncated or corrupt"),
        (lambda b: b[:-1] + bytes([b[-1] ^ 1]), "truncated or corrupt"),
        (lambda b: b + b"x", "truncated or corrupt"),
    ])
    def test_damage_is_a_state_error_naming_the_path(self, path, damage, match):
        path.write_bytes(damage(path.read_bytes()))
        with pytest.raises(StateError, match=f"{path}.*{match}"):
            StateStore(path).load()

    def test_wrong_record(self, tmp_path):
        from brimline.daemon.recording import pack_record
        p = tmp_path / "state.bin"
        p.write_bytes(MAGIC + pack_record(codec.encode("status", {"x": 1})))
        with pytest.raises(StateError, match="not a saved map"):
            StateStore(p).load()

    def test_unreadable(self, tmp_path):
        (tmp_path / "d").mkdir()
        with pytest.raises(StateError, match="cannot read state"):
            StateStore(tmp_path / "d").load()

    def test_missing_directory_on_save(self, tmp_path):
        with pytest.raises(StateError, match="cannot save state"):
            StateStore(tmp_path / "nowhere" / "state.bin").save(make_map(1))


class TestCrash:
    def test_failed_rename_keeps_the_old_state(self, tmp_path, monkeypatch):
        store = StateStore(tmp_path / "state.bin")
        store.save(make_map(1))

        def broken(*a):
            raise OSError("disk unplugged")
        monkeypatch.setattr(os, "replace", broken)
        with pytest.raises(StateError, match="disk unplugged"):
            store.save(make_map(2))
        monkeypatch.undo()
        assert store.load().seq == 1
        assert os.listdir(tmp_path) == ["state.bin"]

    def test_kill_between_write_and_rename(self, tmp_path):
        """A process killed (SIGKILL) after writing the new state's temporary file and before
        the rename: the old state still loads."""
        path = tmp_path / "state.bin"
        script = textwrap.dedent(f"""
            import os, signal, sys
            sys.path.insert(0, {os.path.dirname(__file__)!r})
            from protocol_helpers import make_map
            from brimline.daemon.state import StateStore
            store = StateStore({str(path)!r})
            store.save(make_map(1))
            os.replace = lambda *a: os.kill(os.getpid(), signal.SIGKILL)
            store.save(make_map(2))
        """)
        proc = subprocess.run([sys.executable, "-c", script], timeout=30)
        assert proc.returncode == -9
        assert StateStore(path).load().seq == 1
        leftovers = [n for n in os.listdir(tmp_path) if n != "state.bin"]
        assert len(leftovers) == 1 and leftovers[0].endswith(".tmp")
        StateStore(path).save(make_map(3))  # the next save clears what the crash left
        assert os.listdir(tmp_path) == ["state.bin"]


def test_sequence_numbers_strictly_increase_across_a_restart(tmp_path):
    """The service's pattern: save before publish, continue at saved.next_seq after a restart.
    A follower connected through the restart sees one epoch with strictly increasing seq."""
    ctx = zmq.Context()
    store = StateStore(tmp_path / "state.bin", fsync=False)
    seen = []
    try:
        first = MapPublisher(map_endpoint=ANY_PORT, snapshot_endpoint=ANY_PORT,
                             ack_endpoint=None, linger_s=0, context=ctx)
        endpoints = dict(map_endpoint=first.map_endpoint,
                         snapshot_endpoint=first.snapshot_endpoint)
        f = Follower(plan=wifi_like_plan(), context=ctx, on_map=seen.append, **endpoints)

        def run_daemon(pub, count):
            saved = store.load()
            epoch = saved.epoch if saved else new_epoch()
            seq = saved.next_seq if saved else 0
            if saved:
                pub.prime(saved.load_map)
            for s in range(seq, seq + count):
                m = make_map(s, epoch=epoch)
                store.save(m)
                pub.publish(m)
                assert until(lambda: f.current is not None and f.current.seq == s,
                             step=lambda: (pub.handle_snapshot(), pub.heartbeat(0.0),
                                           f.poll(0.005)))

        run_daemon(first, 3)
        first.close()  # the daemon stops; the follower keeps its map
        second = []

        def rebind():  # close() frees the ports asynchronously (ZeroMQ's I/O thread)
            try:
                second.append(MapPublisher(ack_endpoint=None, linger_s=0, context=ctx,
                                           **endpoints))
            except ProtocolError:
                pass
            return bool(second)
        assert until(rebind, 5.0)
        second = second[0]
        run_daemon(second, 3)
        second.close()
        f.close()
    finally:
        ctx.destroy(linger=0)
    seqs = [m.seq for m in seen]
    assert seqs == sorted(set(seqs)) and seqs[-1] == 5
    assert len({m.epoch for m in seen}) == 1
