"""Page data of the browser view: status messages in, the page's dicts out (no sockets)."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from brimline.daemon.errors import ProtocolError
from brimline.daemon.records import LoadMap
from brimline.daemon.runtime.status import Change, build_status
from brimline.daemon.views.lookout_data import FIGURES, Timeline, column_tones, page_frame


def _status(*, epoch="c0ffee", time_s=8.0, seq=12, kind="emergency", link=None, **kw):
    tones = np.r_[-50:0, 1:51]
    snr = np.full(100, 24.0)
    snr[10:30] = 3.0
    bits = np.where(snr > 10, 6, 0)
    m = LoadMap(epoch=epoch, seq=seq, effective_frame=340, created_s=7.5, plan_id="p",
                tone_index=tones, bits=bits, power_lin=np.where(bits > 0, 1.0, 0.0),
                total_bits=int(bits.sum()), margin_db=2.4, gap_db=12.8,
                reason="20 tones below downshift margin")
    args = dict(time_s=time_s, epoch=epoch,
                driver={"name": "sim", "state": "running", "counters": {}},
                frames={"received": 400, "accepted": 396, "rejected": {"non_finite": 4},
                        "last_frame": 336},
                estimate_age_s=0.02, tone_index=tones, snr_db=snr, current_map=m,
                current_kind=kind, changes=[Change(2.0, "reload", "first map", seq - 1),
                                            Change(7.5, kind, "20 tones below", seq)],
                symbol_rate_hz=1e5, link=link)
    args.update(kw)
    return {**build_status(**args), "status_seq": 5}


def _figure(frame, key):
    return next(f["value"] for f in frame["figures"] if f["key"] == key)


class TestPageFrame:
    def test_band_tones_and_figures_come_from_the_status(self):
        st_ = _status()
        frame = page_frame(st_)
        band = frame["band"]
        assert band["tone_first"] == -50 and band["tone_last"] == 50 and band["tones"] == 100
        assert band["columns"] == len(band["snr_db"]) == len(band["tone_axis"]) == 100
        assert band["tone_axis"][0] == -50 and band["tone_axis"][-1] == 50
        assert band["snr_db"] == st_["band"]["snr_db"]
        assert _figure(frame, "line_rate_mbps") == pytest.approx(st_["rate"]["rate_bps"] / 1e6)
        assert _figure(frame, "headroom_db") == pytest.approx(2.4)
        assert _figure(frame, "bits_per_symbol") == st_["rate"]["bits_per_symbol"]
        assert frame["map"]["seq"] == 12 and frame["map"]["kind"] == "emergency"
        assert [c["seq"] for c in frame["changes"]] == [12, 11]  # newest first
        assert frame["frames"] == {"received": 400, "accepted": 396, "rejected": 4}
        assert [a["name"] for a in frame["alarms"]] == ["emergency"]
        assert frame["alarms"][0]["meaning"]
        assert frame["status_seq"] == 5
        json.dumps(frame, allow_nan=False)  # strict JSON

    def test_what_the_status_does_not_carry_is_none(self):
        frame = page_frame(_status())
        assert _figure(frame, "goodput_mbps") is None  # no closed loop
        assert _figure(frame, "net_rate_mbps") is None  # not in this daemon's status
        assert _figure(frame, "target_margin_db") is None

    def test_the_radios_sample_clock_offset_rides_with_the_source(self):
        st_ = _status()
        assert page_frame(st_)["source"]["clock_offset_ppm"] is None  # the simulator: none
        st_["driver"]["clock_offset_ppm"] = 49.8
        assert page_frame(st_)["source"]["clock_offset_ppm"] == pytest.approx(49.8)
        st_["driver"]["clock_offset_ppm"] = "fast"
        with pytest.raises(ProtocolError, match="driver.clock_offset_ppm"):
            page_frame(st_)

    def test_newer_names_win_and_closed_loop_goodput_shows(self):
        st_ = _status(link={"goodput_bps": 452e3, "frame_error_rate": 0.01})
        st_["rate"]["net_rate_bps"] = 452e3
        st_["margin"] = {"headroom_db": 0.5, "target_db": 3.0}
        frame = page_frame(st_)
        assert _figure(frame, "goodput_mbps") == pytest.approx(0.452)
        assert _figure(frame, "net_rate_mbps") == pytest.approx(0.452)
        assert _figure(frame, "headroom_db") == pytest.approx(0.5)
        assert _figure(frame, "target_margin_db") == pytest.approx(3.0)

    def test_an_empty_status_gives_empty_places(self):
        frame = page_frame({"type": "status"})
        assert frame["band"]["tone_axis"] == [] and frame["band"]["columns"] == 0
        assert all(f["value"] is None for f in frame["figures"])
        assert frame["map"] is None and frame["changes"] == [] and frame["alarms"] == []
        assert len(frame["figures"]) == len(FIGURES)

    def test_unknown_fields_are_ignored(self):
        st_ = _status()
        st_["a_field_from_later"] = {"x": [1, 2, "three"]}
        st_["band"]["something_new"] = "yes"
        assert page_frame(st_)["band"]["columns"] == 100

    def test_the_groups_first_tones_make_the_axis_where_the_status_lists_them(self):
        st_ = _status()
        st_["band"]["tone_index"] = list(range(-50, 50))
        st_["band"]["tones_per_column"] = 1
        assert page_frame(st_)["band"]["tone_axis"] == list(range(-50, 50))
        st_["band"]["tones_per_column"] = 3  # a group of 3 stands at its middle tone
        assert page_frame(st_)["band"]["tone_axis"][:2] == [-49.0, -48.0]
        st_["band"]["tone_index"] = [0, 1]  # does not fit the band: evenly spread instead
        assert page_frame(st_)["band"]["tone_axis"][-1] == 50

    def test_alarms_with_counts_in_either_form(self):
        st_ = _status()
        st_["alarms"] = [{"name": "emergency", "count": 3, "since_s": 2.5}, "stale"]
        frame = page_frame(st_)
        assert frame["alarms"][0] == {"name": "emergency", "meaning": frame["alarms"][0]["meaning"],
                                      "count": 3, "since_s": 2.5}
        assert frame["alarms"][1]["count"] is None
        st_["alarms"] = {"fallback": {"count": 2}, "stale": 4}
        assert [(a["name"], a["count"]) for a in page_frame(st_)["alarms"]] == [
            ("fallback", 2), ("stale", 4)]

    def test_non_finite_numbers_become_none(self):
        st_ = _status()
        st_["time_s"] = math.nan
        st_["band"]["snr_db"][0] = math.inf
        frame = page_frame(st_)
        assert frame["time_s"] is None and frame["band"]["snr_db"][0] is None

    @pytest.mark.parametrize("where,value,match", [
        (("band", "snr_db"), "abc", r"band\.snr_db='abc' is not a list"),
        (("band", "snr_db"), [1.0, "x"], r"band\.snr_db\[1\]='x' is not a number"),
        (("time_s",), "soon", r"time_s='soon' is not a number"),
        (("band",), [1, 2], r"band=\[1, 2\] is not a mapping"),
        (("map", "seq"), 1.5, r"map\.seq=1\.5 is not a whole number"),
        (("alarms",), [3], r"alarms\[0\]=3 is neither a name nor a mapping"),
        (("rate", "line_rate_bps"), True, r"rate\.line_rate_bps=True is not a number"),
    ])
    def test_a_known_field_of_the_wrong_type_is_a_protocol_error(self, where, value, match):
        st_ = _status()
        node = st_
        for key in where[:-1]:
            node = node[key]
        node[where[-1]] = value
        with pytest.raises(ProtocolError, match=match) as info:
            page_frame(st_)
        assert info.value.reason == "status_shape"

    def test_an_oversized_band_is_refused(self):
        st_ = _status()
        st_["band"]["bits"] = [1.0] * 5000
        with pytest.raises(ProtocolError, match="more than 4096 items"):
            page_frame(st_)

    @given(st.dictionaries(
        st.sampled_from(["band", "rate", "time_s", "map", "changes", "alarms", "frames",
                         "driver", "link", "margin", "epoch", "status_seq", "margin_db"]),
        st.recursive(st.none() | st.booleans() | st.integers() | st.floats() | st.text(max_size=4),
                     lambda inner: st.lists(inner, max_size=4)
                     | st.dictionaries(st.sampled_from(
                         ["snr_db", "bits", "power_db", "tone_first", "seq", "kind", "name",
                          "count", "rate_bps", "goodput_bps", "received", "rejected"]),
                         inner, max_size=4), max_leaves=12)))
    def test_any_json_shape_gives_a_frame_or_a_protocol_error(self, message):
        try:
            frame = page_frame({"type": "status", **message})
        except ProtocolError as exc:
            assert exc.reason == "status_shape"
        else:
            json.dumps(frame, allow_nan=False)


def test_column_tones_are_group_centres_in_the_daemon_numbering():
    assert column_tones(-2, 2, 5) == [-2.0, -1.0, 0.0, 1.0, 2.0]
    assert column_tones(-100, 100, 3) == [-100.0, 0.0, 100.0]
    assert column_tones(4, 8, 1) == [6.0]
    assert column_tones(None, 8, 4) == [] and column_tones(0, 8, 0) == []


class TestTimeline:
    def test_points_rows_and_one_mark_per_map(self):
        tl = Timeline()
        first = tl.add(page_frame(_status(time_s=8.0)))
        assert first["point"]["t"] == 8.0 and first["row"]["snr_db"]
        assert [m["label"] for m in first["marks"] if m["type"] == "map"] == [
            "seq 11 reload", "seq 12 emergency"]
        assert [m["t"] for m in first["marks"] if m["type"] == "map"] == [2.0, 7.5]
        assert [m["kind"] for m in first["marks"] if m["type"] == "alarm"] == ["emergency"]
        again = tl.add(page_frame(_status(time_s=8.25)))
        assert again["marks"] == []  # the same maps and the same alarm: no new marks
        snap = tl.snapshot()
        assert [p["t"] for p in snap["points"]] == [8.0, 8.25]
        assert len(snap["rows"]) == 2 and len(snap["marks"]) == 3
        assert snap["frame"]["time_s"] == 8.25

    def test_a_new_epoch_or_time_running_back_starts_afresh(self):
        tl = Timeline()
        tl.add(page_frame(_status(time_s=8.0)))
        back = tl.add(page_frame(_status(time_s=1.0)))
        assert back["reset"] and [p["t"] for p in tl.snapshot()["points"]] == [1.0]
        other = tl.add(page_frame(_status(time_s=2.0, epoch="beef")))
        assert other["reset"]
        assert not tl.add(page_frame(_status(time_s=3.0, epoch="beef")))["reset"]

    def test_history_is_bounded(self):
        tl = Timeline(points=5, rows=3, marks=4)
        for i in range(20):
            tl.add(page_frame(_status(time_s=float(i), seq=2 * i + 1)))
        snap = tl.snapshot()
        assert len(snap["points"]) == 5 and len(snap["rows"]) == 3 and len(snap["marks"]) == 4

    def test_alarms_stay_in_the_book_with_their_counts_after_they_clear(self):
        tl = Timeline()
        tl.add(page_frame(_status(time_s=4.0)))  # emergency raised
        calm = _status(time_s=5.0, kind="reload")
        tl.add(page_frame(calm))
        update = tl.add(page_frame(_status(time_s=6.0, seq=14)))  # raised again
        (entry,) = update["alarm_book"]
        assert entry["name"] == "emergency" and entry["count"] == 2 and entry["active"]
        assert entry["raised_s"] == 6.0 and entry["cleared_s"] == 5.0
        after = tl.add(page_frame(_status(time_s=7.0, seq=15, kind="reload")))
        assert after["alarm_book"][0]["active"] is False
        assert after["alarm_book"][0]["count"] == 2
        assert tl.snapshot()["alarm_book"] == after["alarm_book"]

    def test_a_daemon_that_counts_its_alarms_is_believed(self):
        tl = Timeline()
        st_ = _status(time_s=1.0)
        st_["alarms"] = [{"name": "stale", "count": 7}]
        assert tl.add(page_frame(st_))["alarm_book"][0]["count"] == 7

    def test_a_status_without_time_adds_no_point(self):
        tl = Timeline()
        update = tl.add(page_frame({"type": "status"}))
        assert update["point"] is None and update["row"] is None
        assert tl.snapshot()["frame"] is not None

    @pytest.mark.parametrize("bad", [0, -1, 2.5])
    def test_sizes_must_be_positive_integers(self, bad):
        with pytest.raises(ValueError, match="points="):
            Timeline(points=bad)
