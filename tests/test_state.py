"""StateStore and StateKeeper: atomic saves, damaged files, the seq lease across crashes."""

import os
import subprocess
import sys
import textwrap

import pytest
import zmq
from protocol_helpers import ANY_PORT, make_map, until, wifi_like_plan

from brimline.daemon.errors import ProtocolError, StateError
from brimline.daemon.net.follower import Follower
from brimline.daemon.net.publisher import MapPublisher
from brimline.daemon.wire import codec
from brimline.daemon.wire.recording import MAGIC
from brimline.daemon.wire.state import StateKeeper, StateStore, new_epoch


def test_no_file_is_no_state(tmp_path):
    assert StateStore(tmp_path / "state.bin").load() is None


def test_round_trip(tmp_path):
    store = StateStore(tmp_path / "state.bin")
    store.save("abcd", 300, make_map(4, epoch="abcd"))
    saved = StateStore(tmp_path / "state.bin").load()
    assert (saved.epoch, saved.seq, saved.seq_ceiling, saved.next_seq) == ("abcd", 4, 300, 301)
    assert saved.load_map.total_bits == make_map(4).total_bits
    assert os.listdir(tmp_path) == ["state.bin"]  # no temporary files left behind


def test_lease_without_a_map(tmp_path):
    store = StateStore(tmp_path / "state.bin")
    store.save("abcd", 255)
    saved = store.load()
    assert (saved.load_map, saved.seq, saved.next_seq) == (None, -1, 256)


def test_saved_map_bytes_are_the_ones_given(tmp_path):
    m = make_map(7)
    frames = codec.encode(codec.TOPIC_MAP, m)
    store = StateStore(tmp_path / "state.bin")
    store.save("e1", 9, m, map_frames=frames)
    from brimline.daemon.wire.recording import pack_record
    assert store.path.read_bytes().endswith(pack_record(frames))
    assert store.load().load_map.seq == 7


@pytest.mark.parametrize("epoch, ceiling", [("other", 10), ("e1", 6)])
def test_a_map_outside_the_lease_is_refused(tmp_path, epoch, ceiling):
    with pytest.raises(ValueError, match="does not fit"):
        StateStore(tmp_path / "state.bin").save(epoch, ceiling, make_map(7))
    assert not (tmp_path / "state.bin").exists()


def test_new_epoch_ids_differ():
    ids = {new_epoch() for _ in range(100)}
    assert len(ids) == 100 and all(len(i) == 16 for i in ids)


class TestDamagedFiles:
    @pytest.fixture
    def path(self, tmp_path):
        p = tmp_path / "state.bin"
        StateStore(p).save("e1", 100, make_map(3))
        return p

    @pytest.mark.parametrize("damage, match", [
        (lambda b: b"", "bad magic"),
        (lambda b: b"hello world, not state", "bad magic"),
        (lambda b: b[:len(MAGIC) + 3], "truncated"),
        (lambda b: b[:-5], "truncated or corrupt"),
        (lambda b: b[:-1] + bytes([b[-1] ^ 1]), "truncated or corrupt"),
        (lambda b: b + b"x", "after its two records"),
    ])
    def test_damage_is_a_state_error_naming_the_path(self, path, damage, match):
        path.write_bytes(damage(path.read_bytes()))
        with pytest.raises(StateError, match=f"{path}.*{match}"):
            StateStore(path).load()

    @pytest.mark.parametrize("records, match", [
        ([("status", {"x": 1})], "not a state record"),
        ([("state", {"epoch": "e1", "seq_ceiling": 2.5})], "not a state record"),
        ([("state", make_map(3))], "not a state record"),  # a map alone has no ceiling
        ([("state", {"epoch": "e1", "seq_ceiling": 9}), ("status", {"x": 1})], "not a map"),
        ([("state", {"epoch": "e1", "seq_ceiling": 2}), ("map", make_map(3))], "does not fit"),
        ([("state", {"epoch": "e2", "seq_ceiling": 9}), ("map", make_map(3))], "does not fit"),
        ([("state", {"epoch": "e1", "seq_ceiling": 9}), ("map", make_map(3)),
          ("map", make_map(4))], "after its two records"),
    ])
    def test_wrong_records(self, tmp_path, records, match):
        from brimline.daemon.wire.recording import pack_record
        p = tmp_path / "state.bin"
        p.write_bytes(MAGIC + b"".join(pack_record(codec.encode(t, r)) for t, r in records))
        with pytest.raises(StateError, match=match):
            StateStore(p).load()

    def test_unreadable(self, tmp_path):
        (tmp_path / "d").mkdir()
        with pytest.raises(StateError, match="cannot read state"):
            StateStore(tmp_path / "d").load()

    def test_missing_folders_are_made_owner_only_on_save(self, tmp_path):
        store = StateStore(tmp_path / "nowhere" / "deeper" / "state.bin")
        store.save("e1", 5, make_map(1))
        assert store.load().seq_ceiling == 5
        assert (tmp_path / "nowhere" / "deeper").stat().st_mode & 0o777 == 0o700

    def test_a_folder_that_cannot_be_made_on_save(self, tmp_path):
        (tmp_path / "plain").write_text("a file where a folder would go")
        with pytest.raises(StateError, match="cannot save state"):
            StateStore(tmp_path / "plain" / "state.bin").save("e1", 5, make_map(1))


class TestCrash:
    def test_failed_rename_keeps_the_old_state(self, tmp_path, monkeypatch):
        store = StateStore(tmp_path / "state.bin")
        store.save("e1", 5, make_map(1))

        def broken(*a):
            raise OSError("disk unplugged")
        monkeypatch.setattr(os, "replace", broken)
        with pytest.raises(StateError, match="disk unplugged"):
            store.save("e1", 5, make_map(2))
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
            from brimline.daemon.wire.state import StateStore
            store = StateStore({str(path)!r})
            store.save("e1", 5, make_map(1))
            os.replace = lambda *a: os.kill(os.getpid(), signal.SIGKILL)
            store.save("e1", 5, make_map(2))
        """)
        proc = subprocess.run([sys.executable, "-c", script], timeout=30)
        assert proc.returncode == -9
        assert StateStore(path).load().seq == 1
        leftovers = [n for n in os.listdir(tmp_path) if n != "state.bin"]
        assert len(leftovers) == 1 and leftovers[0].endswith(".tmp")
        StateStore(path).save("e1", 5, make_map(3))  # the next save clears what the crash left
        assert os.listdir(tmp_path) == ["state.bin"]


class TestLease:
    """The seq lease: every seq published is covered by a durable ceiling, so a restart never
    reuses one, however far the lazily saved map lags behind."""

    def test_restart_starts_above_every_reserved_seq_with_a_stalled_writer(self, tmp_path):
        store = StateStore(tmp_path / "state.bin", fsync=False)
        saves = []
        real_save = store.save
        store.save = lambda *a, **k: (saves.append(a[1]), real_save(*a, **k))
        keeper = StateKeeper(store, lease=64, min_interval_s=3600.0)  # the writer saves once
        epoch, first, _ = keeper.restore()
        assert first == 0 and store.load().seq_ceiling == 64
        for seq in range(1000):
            keeper.reserve(seq)
            keeper.submit(make_map(seq, epoch=epoch))
        # A crash now: nothing more is saved (no close). The map on disk is far behind ...
        saved = StateStore(store.path).load()
        assert saved.seq < 999 - 16
        # ... but the restart is above every seq handed out, and the lease cost a save per 64.
        assert saved.epoch == epoch and saved.next_seq > 999
        assert len(saves) <= 1000 // 64 + 3
        keeper.close()

    def test_restore_continues_above_the_ceiling_and_saves_a_new_one(self, tmp_path):
        StateStore(tmp_path / "state.bin").save("e1", 300, make_map(4))
        keeper = StateKeeper(StateStore(tmp_path / "state.bin"), lease=100)
        epoch, next_seq, m = keeper.restore()
        assert (epoch, next_seq, m.seq) == ("e1", 301, 4)
        assert StateStore(tmp_path / "state.bin").load().seq_ceiling == 401
        keeper.close()
        assert StateStore(tmp_path / "state.bin").load().seq == 4

    def test_writer_renews_the_lease_ahead_of_need(self, tmp_path):
        store = StateStore(tmp_path / "state.bin", fsync=False)
        keeper = StateKeeper(store, lease=100, min_interval_s=0.0)
        epoch, _, _ = keeper.restore()
        for seq in range(60):  # past half of the first lease
            keeper.reserve(seq)
        keeper.submit(make_map(59, epoch=epoch))
        # The writer sets keeper.ceiling just after the file is replaced (under its save lock),
        # so a reader that saw the file can still see the old value: wait for both.
        assert until(lambda: store.load().seq == 59 and keeper.ceiling == 159)
        assert store.load().seq_ceiling == 159
        keeper.close(make_map(60, epoch=epoch))
        assert store.load().seq == 60

    def test_a_failed_lease_save_raises_and_keeps_the_ceiling(self, tmp_path):
        store = StateStore(tmp_path / "state.bin", fsync=False)
        keeper = StateKeeper(store, lease=10)
        keeper.restore()
        keeper.reserve(10)
        store.path = tmp_path / "gone" / "state.bin"  # after the first save: not made
        with pytest.raises(StateError, match="cannot save state"):
            keeper.reserve(11)
        assert keeper.ceiling == 10
        keeper.close()


def test_sequence_numbers_strictly_increase_across_a_restart(tmp_path):
    """The service's pattern: reserve before publish, submit after, continue at the restored
    next_seq. A follower connected through the restart sees one epoch with strictly
    increasing seq, and the restart continues just above the ceiling the first run saved.

    Where that ceiling lies depends on when the writer thread renewed the lease (it renews when
    less than half a lease is left after the newest map; otherwise ``reserve`` saves
    ``seq + lease`` synchronously), so it is read from the file: anywhere from the last
    published seq to one lease above it, never below."""
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
            keeper = StateKeeper(store, lease=4)
            epoch, seq, saved = keeper.restore()
            if saved:
                pub.prime(saved)
            for s in range(seq, seq + count):
                m = make_map(s, epoch=epoch)
                keeper.reserve(s)
                keeper.submit(m, pub.publish(m))
                assert until(lambda: f.current is not None and f.current.seq == s,
                             step=lambda: (pub.handle_snapshot(), pub.heartbeat(0.0),
                                           f.poll(0.005)))
            keeper.close()

        run_daemon(first, 6)
        first.close()  # the daemon stops; the follower keeps its map
        ceiling = store.load().seq_ceiling
        second = []

        def rebind():  # close() frees the ports asynchronously (ZeroMQ's I/O thread)
            try:
                second.append(MapPublisher(ack_endpoint=None, linger_s=0, context=ctx,
                                           **endpoints))
            except ProtocolError:
                pass
            return bool(second)
        assert until(rebind)
        second = second[0]
        run_daemon(second, 3)
        second.close()
        f.close()
    finally:
        ctx.destroy(linger=0)
    seqs = [m.seq for m in seen]
    assert seqs == sorted(set(seqs)) and seqs[:6] == list(range(6))
    assert 5 <= ceiling <= 5 + 4  # covers every published seq, at most one lease (4) above
    assert seqs[6:] == [ceiling + 1, ceiling + 2, ceiling + 3]  # skips the rest of the lease
    assert len({m.epoch for m in seen}) == 1
