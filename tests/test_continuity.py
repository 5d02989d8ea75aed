"""Frame-counter continuity (drivers/link/continuity.py): lost frames, suspected overflows and
spliced frames, from sample positions and header counters (invented positions)."""

from brimline.drivers.link.continuity import COUNTER_MODULUS, MAX_HELD, Continuity

L = 100  # frame length in samples


def _feed(c, frames):
    """``frames``: (start, counter or None for a failed header); returns (item, ok) pairs."""
    out = []
    for start, counter in frames:
        out += c.frame(start, start=start, end=start + L, header_ok=counter is not None,
                       counter=-1 if counter is None else counter)
    return out


class TestContinuity:
    def test_consecutive_counters_lose_nothing(self):
        c = Continuity()
        c.boundary(0)
        out = _feed(c, [(0, 5), (150, 6), (300, 7)])
        assert out == [(0, True), (150, True), (300, True)] and not c.counters

    def test_the_16_bit_counter_wraps_without_loss(self):
        c = Continuity()
        assert COUNTER_MODULUS == 65536
        assert [ok for _, ok in _feed(c, [(0, 65535), (150, 0)])] == [True, True]
        assert c.counters["lost_frames"] == 0

    def test_gap_inside_one_buffer_is_lost_frames_not_an_overflow(self):
        c = Continuity()
        c.boundary(0)
        _feed(c, [(0, 1), (450, 4)])
        assert c.counters["lost_frames"] == 2 and c.counters["suspected_overflows"] == 0

    def test_gap_across_a_buffer_boundary_is_a_suspected_overflow(self):
        c = Continuity()
        c.boundary(0)
        _feed(c, [(0, 1)])
        c.boundary(120)
        _feed(c, [(200, 9)])
        assert c.counters["lost_frames"] == 7 and c.counters["suspected_overflows"] == 1

    def test_failed_headers_in_between_are_not_lost(self):
        c = Continuity()
        out = _feed(c, [(0, 1), (150, None), (300, 3)])
        assert c.counters["lost_frames"] == 0 and [ok for _, ok in out] == [True] * 3

    def test_a_spanning_frame_waits_for_the_next_header(self):
        c = Continuity()
        c.boundary(0)
        c.boundary(50)  # inside the first frame
        assert _feed(c, [(0, 1)]) == []  # held
        assert _feed(c, [(150, 2)]) == [(0, True), (150, True)]

    def test_a_spanning_frame_before_a_gap_is_damaged(self):
        c = Continuity()
        c.boundary(0)
        _feed(c, [(0, 1)])
        c.boundary(200)  # inside the next frame, where samples were lost
        assert _feed(c, [(150, 2)]) == []
        assert _feed(c, [(400, 6)]) == [(150, False), (400, True)]
        assert c.counters["damaged_frames"] == 1 and c.counters["lost_frames"] == 3

    def test_where_the_samples_were_lost(self):
        """The boundary of a suspected overflow: between the two frames when no frame spans
        it; inside the frame before the gap when that frame was spliced there."""
        c = Continuity()
        c.boundary(0)
        _feed(c, [(0, 1)])
        c.boundary(120)
        _feed(c, [(200, 9)])
        assert c.overflow_positions == [120]
        c = Continuity()
        c.boundary(0)
        _feed(c, [(0, 1)])
        c.boundary(200)  # inside the next frame, where samples were lost
        c.boundary(300)  # inside the frame after the gap: not where they were lost
        _feed(c, [(150, 2), (260, 6)])
        assert c.counters["suspected_overflows"] == 1 and c.overflow_positions == [200]

    def test_a_repeated_counter_is_a_cyclic_buffer(self):
        c = Continuity()
        _feed(c, [(0, 0), (150, 0), (300, 0)])
        assert c.counters["counter_repeats"] == 2 and c.counters["lost_frames"] == 0

    def test_a_big_jump_is_a_restart_not_lost_frames(self):
        c = Continuity()
        _feed(c, [(0, 1000), (150, 3)])  # backwards: the transmitter started again
        assert c.counters["counter_jumps"] == 1 and c.counters["lost_frames"] == 0

    def test_held_frames_are_bounded(self):
        c = Continuity()
        c.boundary(0)
        c.boundary(50)
        out = _feed(c, [(0, 1)] + [(150 * k, None) for k in range(1, MAX_HELD + 1)])
        assert len(out) == MAX_HELD + 1 and out[0] == (0, False)

    def test_restart_drops_held_frames_as_damaged(self):
        c = Continuity()
        c.boundary(0)
        c.boundary(50)
        _feed(c, [(0, 1)])
        assert c.restart() == [(0, False)] and c.counters["damaged_frames"] == 1
        assert [ok for _, ok in _feed(c, [(0, 9)])] == [True]  # a new stream: no gap
