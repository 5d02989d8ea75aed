"""The operators' view: pure rendering of a status dict, and the plain-line fallback."""

from __future__ import annotations

import io
import re
import queue
import threading
import time

import numpy as np
import pytest
from _service_fakes import ScriptedDriver, loopback_config
from rich.console import Console

from brimline.daemon.commands.cli import main
from brimline.daemon.commands.run import end_summary
from brimline.daemon.errors import InputError
from brimline.daemon.records import LoadMap
from brimline.daemon.runtime.status import Change, build_status, summary_line
from brimline.daemon.views.watch import (
    BIT_SHADES,
    POWER_ROW_DB,
    band_picture,
    parse_snr_scale,
    render,
    screen_columns,
    update_alarms,
    watch,
)
from brimline.drivers.link.frame import make_plan


def _text(renderable, width=110, height=None) -> str:
    console = Console(width=width, height=height or 25, record=True, file=io.StringIO(),
                      force_terminal=False)
    console.print(renderable)
    return console.export_text()


def _status(**kw):
    tones = np.r_[-50:0, 1:51]
    snr = np.full(100, 24.0)
    snr[10:30] = 3.0
    bits = np.where(snr > 10, 6, 0)
    m = LoadMap(epoch="c0ffee", seq=12, effective_frame=340, created_s=7.5, plan_id="p",
                tone_index=tones, bits=bits, power_lin=np.where(bits > 0, 1.0, 0.0),
                total_bits=int(bits.sum()), margin_db=2.4, gap_db=12.8,
                reason="20 tones below downshift margin")
    args = dict(time_s=8.0, epoch="c0ffee",
                driver={"name": "sim", "state": "running", "counters": {"frames": 400}},
                frames={"received": 400, "accepted": 396, "rejected": {"non_finite": 4},
                        "last_frame": 336},
                estimate_age_s=0.02, tone_index=tones, snr_db=snr, current_map=m,
                current_kind="emergency", maps_published={"reload": 3, "emergency": 1},
                changes=[Change(2.0, "reload", "first map", 9),
                         Change(7.5, "emergency", "20 tones below downshift margin", 12)],
                acks={"followers": {"seq": 12, "age_s": 0.1}}, symbol_rate_hz=1e5)
    args.update(kw)
    return build_status(**args)


def test_render_shows_figures_history_and_alarms():
    text = _text(render(_status()))
    for needed in ("400 in, 396 used", "non_finite 4", "+2.40 dB", "seq 12", "emergency",
                   "20 tones below downshift margin", "EMERGENCY", "bits/symbol",
                   "line rate", "acked seq 12"):
        assert needed in text, needed


def test_source_line_shows_the_sample_clock_offset():
    """driver.clock_offset_ppm on the source line, signed, at 80 and 160 columns; nothing
    when the source measures none (the simulator) or the field holds junk."""
    st = _status(driver={"name": "radio", "state": "running", "counters": {},
                         "clock_offset_ppm": 49.96})
    assert st["driver"]["clock_offset_ppm"] == 50.0
    for width in (80, 160):
        assert "sample clock +50.0 ppm" in _text(render(st, width=width), width=width)
    neg = _status(driver={"name": "radio", "state": "running", "clock_offset_ppm": -3.25})
    assert "sample clock -3.2 ppm" in _text(render(neg))
    assert "sample clock" not in _text(render(_status()))
    junk = _status()
    junk["driver"]["clock_offset_ppm"] = "fast"
    assert "sample clock" not in _text(render(junk))


def test_bits_strip_marks_faded_tones_as_unloaded():
    st = _status()
    rows = [t.plain for t in band_picture(st["band"], width=110)]
    strip = [r for r in rows if r.startswith("bits")][0][10:]
    assert len(strip) == 100  # one tone per column: 100 data tones fit 100 cells
    assert set(strip[10:30]) == {"·"} and set(strip[:10]) == {"▓"}  # 6 bits: the 5-6 shade


def test_render_without_status_says_so():
    text = _text(render(None, endpoint="tcp://127.0.0.1:7999", silent_s=4.0))
    assert "No status yet from tcp://127.0.0.1:7999" in text


def test_fallback_and_stale_alarms_are_named():
    text = _text(render(_status(stale=True, current_kind="fallback")))
    assert "STALE" in text and "no valid estimate" in text


def test_once_without_daemon_is_a_clear_message_not_a_crash():
    out = io.StringIO()
    code = watch("tcp://127.0.0.1:1", once=True, duration_s=0.3, out=out)
    assert code == 1
    assert "no status from tcp://127.0.0.1:1" in out.getvalue()


def test_plain_lines_from_a_running_daemon():
    """Without a terminal the view prints one readable line per status message. The view's
    clock is held still until the first line is out, then jumps past ``duration_s``, so the
    test waits for content, not for a time (a real-time deadline only catches a hang)."""
    from brimline.daemon.runtime.service import Service

    endpoint: queue.Queue = queue.Queue()
    stop = threading.Event()

    def daemon():
        cfg = loopback_config()
        from brimline.drivers.link.frame import make_plan

        drv = ScriptedDriver(make_plan(**cfg.link.model_dump()), frames=100_000,
                             hold_at=100, release=stop)
        with Service(cfg, driver=drv) as svc:
            endpoint.put(svc.endpoints["status"])
            svc.run(120.0, stop=stop)

    t = threading.Thread(target=daemon)
    t.start()
    out = io.StringIO()
    hang = time.monotonic() + 60

    def clock():
        done = "t=" in out.getvalue() or time.monotonic() > hang
        return 1e9 if done else 0.0

    try:
        assert watch(endpoint.get(timeout=60), duration_s=1.0, out=out, clock=clock) == 0
    finally:
        stop.set()
        t.join(60)
    assert not t.is_alive()
    lines = [ln for ln in out.getvalue().splitlines() if ln.startswith("t=")]
    assert lines and "frames=" in lines[-1] and "seq=" in lines[-1]


def test_chart_fits_a_narrow_terminal():
    text = _text(render(_status(), width=60), width=60)
    assert any(ln.startswith("│ bits") for ln in text.splitlines())
    assert all(len(ln) <= 60 for ln in text.splitlines())


def test_closed_loop_figures_in_view_line_and_summary():
    """The simulator's link block (goodput, FER, BER) shows in the view, the status line and
    the run summary; sources without one show none of it."""
    link = {"frames": 200, "frames_ok": 190, "frame_errors": 10, "frames_lost": 2,
            "bits": 400000, "bit_errors": 40, "goodput_bits": 3800000, "link_time_s": 4.0,
            "frame_error_rate": 0.05, "bit_error_rate": 1e-4, "goodput_bps": 950000.0}
    st = _status(link=link)
    assert st["link"]["goodput_bps"] == 950000.0 and st["link"]["frame_errors"] == 10
    text = _text(render(st))
    assert "0.950 Mbit/s" in text and "FER 0.05" in text and "BER 0.0001" in text
    line = summary_line(st)
    assert "goodput=0.950Mbit/s fer=0.05 ber=0.0001" in line
    summary = end_summary(st)
    assert "goodput 0.950 Mbit/s, frame errors 10 of 200 (FER 0.05), BER 0.0001" in summary
    plain = _status()
    assert plain["link"] is None
    assert "goodput" not in summary_line(plain) + end_summary(plain)
    assert "goodput, errors: [not known" in _text(render(plain))  # a marked empty place


def test_outer_loop_in_the_run_summary():
    """The run summary names the outer loop's state, offset and outcomes; none without it."""
    outer = {"active": True, "offset_db": 1.25, "fer": 0.1, "window": 500, "target_fer": 0.1,
             "outcomes": 900, "errored": 88, "repeated": 0, "went_off": 0, "dropped": {}}
    summary = end_summary(_status(outer=outer))
    assert ("outer loop      on, offset +1.25 dB, 900 outcomes (88 errored), FER 0.1 over the "
            "last 500 (target 0.1)") in summary
    assert "outer loop" not in end_summary(_status())


def test_outer_loop_row_shows_offset_and_error_rate():
    """The outer margin loop's fields: offset, measured frame error rate against the target;
    no row without an outer loop."""
    outer = {"active": True, "offset_db": 1.25, "fer": 0.094, "window": 500,
             "target_fer": 0.1, "outcomes": 2000, "errored": 190, "repeated": 0,
             "went_off": 0, "dropped": {"other_epoch": 2}}
    status = _status(outer=outer)
    assert status["outer"]["offset_db"] == 1.25 and status["outer"]["dropped"] == {
        "other_epoch": 2}
    text = _text(render(status))
    assert "outer loop" in text and "+1.25 dB" in text and "9.4 % of 500" in text
    assert "target 10.0 %" in text
    assert "outer loop" not in _text(render(_status()))


# --------------------------------------------------------------------------- screen sizes

PLAN = make_plan()  # the shipped demo's tone plan: 174 data tones, -99..99 without pilots
LINK = {"frames": 901, "frame_errors": 39, "frame_error_rate": 0.0433, "bits": 8_000_000,
        "bit_errors": 3120, "bit_error_rate": 0.00039, "goodput_bps": 374000.0,
        "link_time_s": 18.0}
TX = {"type": "tx_status", "state": "following", "map_seq": 8, "applied_lag_frames": 2,
      "power_db": -0.31, "peak_tone_db": 2.87, "max_total_db": 0.0, "max_tone_db": 3.0,
      "power_clipped": 1}


def _demo_map(seed=1):
    """A map on the demo plan: a deep fade over tones -90..-25 (as the demo's first event),
    bits from the SNR, powers scattered within -2..+3 dB (invented, seeded)."""
    rng = np.random.default_rng(seed)
    tones = PLAN.data_tones
    snr = 27 + 3 * np.cos(tones / 15.0) + rng.normal(0, 0.5, tones.size)
    snr[(tones >= -90) & (tones <= -25)] -= 20
    bits = np.clip(np.floor((snr - 12) / 3), 0, 8).astype(int)
    power = np.where(bits > 0, 10 ** (rng.uniform(-2, 3, tones.size) / 10), 0.0)
    m = LoadMap(epoch="f4a36d5d85de45a9", seq=8, effective_frame=904, created_s=14.0,
                plan_id=PLAN.plan_id, tone_index=tones, bits=bits, power_lin=power,
                total_bits=int(bits.sum()), margin_db=0.12, gap_db=12.8, reason="x")
    return m, snr


def _demo_status(**kw):
    m, snr = _demo_map()
    args = dict(
        time_s=18.0, epoch=m.epoch, driver={"name": "sim", "state": "running"},
        frames={"received": 901, "accepted": 901, "last_frame": 900}, estimate_age_s=0.0,
        tone_index=PLAN.data_tones, snr_db=snr, current_map=m, current_kind="emergency",
        maps_published={"reload": 5, "emergency": 2, "bit_swap": 2},
        changes=[Change(0.0, "reload", "reload: first map", 0),
                 Change(4.0, "emergency", "emergency: 53 of 174 tones loaded below downshift "
                        "margin, mean SNR fell 5.6 dB since the map", 2),
                 Change(13.0, "reload", "reload: 49 tones below downshift margin", 7),
                 Change(14.0, "emergency", "emergency: 40 of 150 tones", 8)],
        acks={"followers": {"seq": 8, "age_s": 3.9}}, symbol_rate_hz=3.84e6 / 288,
        frame_rate_hz=50.0, data_symbols=12, symbols_per_frame=16, target_margin_db=3.0,
        link=LINK, stale=True)
    args.update(kw)
    return build_status(**args)


def _screen(status, width, height, **kw) -> list[str]:
    text = _text(render(status, width=width, height=height,
                        alarms=kw.pop("alarms", None) or update_alarms(None, status), **kw),
                 width=width, height=height)
    return text.splitlines()


class TestScreenSizes:
    def test_80x24_fits_with_alarms_first_and_details_folded(self):
        lines = _screen(_demo_status(), 80, 24, tx_status=TX)
        assert len(lines) <= 24 and all(len(ln) <= 80 for ln in lines)
        assert "STALE" in lines[1] and "EMERGENCY" in lines[2]  # alarms at the top
        body = "\n".join(lines)
        for kept in ("data rate", "line rate", "headroom", "target margin", "goodput",
                     "applied map 8", "tones per column", "│ tone", "latest maps"):
            assert kept in body, kept
        assert "followers" not in body and "epoch" not in body  # details fold first

    def test_160x50_shows_everything_with_the_band_tall(self):
        lines = _screen(_demo_status(), 160, 50, tx_status=TX)
        assert len(lines) <= 50 and all(len(ln) <= 160 for ln in lines)
        body = "\n".join(lines)
        for kept in ("followers acked seq 8", "epoch f4a36d5d85de45a9", "reload: first map",
                     "(12 data of 16 symbols x 50 frames/s)", "(every symbol as data)"):
            assert kept in body, kept
        snr_rows = [ln for ln in lines if "┤" in ln and "power" not in ln and "│ dB      -" not
                    in ln]
        assert len(snr_rows) >= 8  # the band grows when there is room
        legend = [ln for ln in lines if "legend" in ln]
        assert len(legend) == 1 and "power" in legend[0]  # one legend line when wide

    def test_many_alarms_keep_the_header_and_fit(self):
        st = _demo_status(driver={"name": "radio", "state": "failed", "error": "gone"},
                          state_unsaved=True, recording={"state": "failed"})
        lines = _screen(st, 80, 24, silent_s=9.0)
        assert len(lines) <= 24 and all(len(ln) <= 80 for ln in lines)
        assert "QUIET" in lines[1]
        assert "more alarm lines" in "\n".join(lines)
        assert any(ln.startswith("│ t 18.0 s link time") for ln in lines)

    def test_tiny_terminal_keeps_alarms(self):
        lines = _screen(_demo_status(), 40, 8)
        assert len(lines) <= 8 and "+1 more" in lines[1] and "STALE" in lines[1]


# --------------------------------------------------------------------------- the numbers


def _body(status, **kw) -> str:
    return "\n".join(_screen(status, 160, 50, **kw))


class TestShownNumbers:
    """Each number on screen is the number it summarises, worked out here on its own."""

    def test_data_rate_is_bits_times_data_symbols_times_frames(self):
        st = _demo_status()
        m, _ = _demo_map()
        want = m.total_bits * 12 * 50.0 / 1e6
        assert f"data rate {want:.3f} Mbit/s" in _body(st)

    def test_line_rate_is_bits_times_ofdm_symbol_rate(self):
        m, _ = _demo_map()
        want = m.total_bits * 3.84e6 / (256 + 32) / 1e6
        assert f"line rate {want:.3f} Mbit/s" in _body(_demo_status())

    def test_bits_per_symbol_is_the_maps_total(self):
        m, _ = _demo_map()
        assert f"{int(m.bits.sum())} bits/symbol" in _body(_demo_status())

    def test_headroom_and_target_margin(self):
        body = _body(_demo_status())
        assert "headroom +0.12 dB above the target" in body  # the map's margin_db
        assert "target margin 3.00 dB" in body  # loading.margin_db as given

    def test_goodput_frame_and_bit_errors(self):
        body = _body(_demo_status())
        assert f"goodput {LINK['goodput_bps'] / 1e6:.3f} Mbit/s" in body
        assert "frame errors 39 of 901 (FER 0.043)" in body
        assert "bit errors BER 0.00039 (3120 of 8000000)" in body

    def test_transmitter_figures(self):
        body = _body(_demo_status(), tx_status=TX)
        assert "tx following" in body and "applied map 8" in body and "lag 2 frames" in body
        assert "power -0.3 dB (limit +0.0 dB)" in body
        assert "peak tone +2.9 dB (limit +3.0 dB)" in body and "clipped 1" in body

    def test_transmitter_figures_are_marked_when_old(self):
        assert "[no transmitter status for 7 s]" in _body(_demo_status(), tx_status=TX,
                                                          tx_silent_s=7.0)
        assert "[no transmitter status for" not in _body(_demo_status(), tx_status=TX,
                                                         tx_silent_s=1.0)

    def test_transmitter_place_is_marked_when_absent(self):
        assert "[not watched: --tx-endpoint" in _body(_demo_status())
        assert "[no transmitter status yet from tcp://h:1]" in _body(
            _demo_status(), tx_endpoint="tcp://h:1")

    def test_link_place_is_marked_when_unknown(self):
        assert "[not known, the source cannot tell what was sent]" in _body(
            _demo_status(link=None))

    def test_data_rate_without_frame_rate_says_so(self):
        body = _body(_demo_status(frame_rate_hz=None))
        assert "data rate - (the source gives no frame rate)" in body

    def test_alarm_counts_and_time_since_last(self):
        """Emergency x2: the daemon's count of emergency maps; last 4.0 s ago: 18.0 s (the
        status's link time) - 14.0 s (the latest emergency change)."""
        body = _body(_demo_status())
        assert "EMERGENCY  x2, last 4.0 s ago" in body
        assert "STALE  x1, last 0.0 s ago" in body

    def test_tones_per_column_and_the_tone_axis(self):
        """174 data tones on 66 plot cells (80 - 4 border - 10 labels): ceil(174/66) = 3 tones
        per column; each axis label sits over the column whose tones hold that number."""
        st = _demo_status()
        assert screen_columns(174, 66) == 3
        lines = [ln[2:-2] for ln in _screen(st, 80, 24)]
        assert any("data tones -99..99, 3 tones per column" in ln for ln in lines)
        i = next(k for k, ln in enumerate(lines) if ln.startswith("tone"))
        ticks, labels = lines[i][10:], lines[i + 1][10:]
        firsts = PLAN.data_tones[::3].tolist()
        placed = {int(mt.group()): mt.start() for mt in re.finditer(r"-?\d+", labels)}
        assert {-75, -50, -25, 0, 25, 50, 75} <= set(placed)
        for tone, at in placed.items():
            col = at + len(str(tone)) // 2  # labels are centred on their tick
            assert ticks[col] == "┬"
            nxt = firsts[col + 1] if col + 1 < len(firsts) else 100
            assert firsts[col] <= tone < nxt, (tone, firsts[col], nxt)

    def test_snr_marks_sit_at_their_value_on_the_fixed_scale(self):
        """Scale 0..40 dB on 4 rows: 10 dB per row, lower half mark in the lower 5 dB."""
        band = {"tone_index": [1, 2, 3, 4, 5, 6], "tones_per_column": 1, "tone_last": 6,
                "snr_db": [7.0, 12.0, 26.0, 38.0, 45.0, -3.0], "bits": [1] * 6,
                "power_db": [0.0] * 6}
        rows = [t.plain[10:] for t in band_picture(band, width=30, snr_rows=4,
                                                   snr_scale_db=(0.0, 40.0))[1:5]]
        # rows[0] is 30..40 dB, rows[3] is 0..10 dB
        assert [r[0] for r in rows] == [" ", " ", " ", "▀"]   # 7 dB: upper half of 0..10
        assert [r[1] for r in rows] == [" ", " ", "▄", " "]   # 12 dB: lower half of 10..20
        assert [r[2] for r in rows] == [" ", "▀", " ", " "]   # 26 dB: upper half of 20..30
        assert [r[3] for r in rows] == ["▀", " ", " ", " "]   # 38 dB
        assert rows[0][4] == "▲" and rows[3][5] == "▼"         # beyond the scale
        assert [t.plain[:10] for t in band_picture(band, width=30, snr_rows=4)[1:5]] == [
            "SNR    40┤", "dB     30┤", "       20┤", "       10┤"]

    def test_snr_scale_does_not_follow_the_data(self):
        """The scale is fixed: the same SNR lands on the same row whatever the others are."""
        a = {"tone_index": [1, 2], "tones_per_column": 1, "tone_last": 2,
             "snr_db": [20.0, 21.0], "bits": [], "power_db": []}
        b = dict(a, snr_db=[20.0, -8.0])
        rows_a = [t.plain[10] for t in band_picture(a, width=30)[1:6]]
        rows_b = [t.plain[10] for t in band_picture(b, width=30)[1:6]]
        assert rows_a == rows_b

    def test_bits_shades_follow_the_legend(self):
        band = {"tone_index": list(range(1, 8)), "tones_per_column": 1, "tone_last": 7,
                "snr_db": [30.0] * 7, "bits": [0, 1, 2, 3, 5, 7, 8], "power_db": [0.0] * 7}
        rows = [t.plain for t in band_picture(band, width=40)]
        assert [r for r in rows if r.startswith("bits")][0][10:] == "·░░▒▓██"
        assert [low for low, _, _ in BIT_SHADES] == [0, 1, 3, 5, 7]
        legend = [r for r in rows if r.startswith("legend") or r.startswith("        ")]
        assert "·0 ░1-2 ▒3-4 ▓5-6 █7+" in "\n".join(legend)

    def test_power_bars_are_signed_db_from_nominal(self):
        """+3 dB is half of a 6 dB row: 4 eighths up; -6 dB a full row down; 0 dB the
        baseline; an unloaded tone (None) blank."""
        assert POWER_ROW_DB == 6.0
        band = {"tone_index": [1, 2, 3, 4, 5], "tones_per_column": 1, "tone_last": 5,
                "snr_db": [30.0] * 5, "bits": [4, 4, 4, 4, 0],
                "power_db": [3.0, -6.0, 0.0, 6.0, None]}
        rows = [t.plain for t in band_picture(band, width=40)]
        up = [r for r in rows if r.startswith("power")][0][10:]
        down = [r for r in rows if r.startswith("dB   ") and "-┤" in r][0][10:]
        assert up == "▄ ▁█ " and down == " █   "

    def test_merged_columns_show_lowest_snr_and_mean_bits(self):
        """Two status columns per screen column: SNR min(11, 30) = 11 dB, bits mean(2, 6) = 4."""
        band = {"tone_index": list(range(1, 121)), "tones_per_column": 1, "tone_last": 120,
                "snr_db": [11.0, 30.0] * 60, "bits": [2, 6] * 60, "power_db": [0.0] * 120}
        pic = [t.plain for t in band_picture(band, width=70, snr_rows=4)]  # 60 plot cells
        assert "2 tones per column" in pic[0]
        bits = [r for r in pic if r.startswith("bits")][0][10:]
        assert set(bits) == {"▒"}  # 4 bits: the 3-4 shade
        assert set(pic[3][10:]) == {"▄"}  # 11 dB: lower half of the 10..20 row


# --------------------------------------------------------------------------- alarms


class TestAlarmMemory:
    def _st(self, t, alarms=(), published=None, changes=()):
        return {"time_s": t, "alarms": list(alarms), "maps_published": published or {},
                "changes": list(changes)}

    def test_counts_raises_and_clears_after_absence(self):
        book = None
        for t, alarms in ((1.0, ["stale"]), (2.0, ["stale"]), (3.0, []), (4.0, ["stale"]),
                          (5.0, [])):
            book = update_alarms(book, self._st(t, alarms), clear_after_s=10.0)
        assert book["stale"]["count"] == 2 and book["stale"]["raised_s"] == 4.0
        assert not book["stale"]["active"] and not book["stale"]["cleared"]
        book = update_alarms(book, self._st(13.9), clear_after_s=10.0)
        assert not book["stale"]["cleared"]
        book = update_alarms(book, self._st(14.0), clear_after_s=10.0)
        assert book["stale"]["cleared"]

    def test_emergency_leaves_a_count_behind(self):
        """The banner goes when the next map is not an emergency; its count stays, first at
        the top while recent, then on the cleared line."""
        changes = [{"time_s": 4.0, "kind": "emergency", "seq": 2}]
        book = update_alarms(None, self._st(4.1, ["emergency"], {"emergency": 1}, changes))
        later = self._st(5.0, [], {"emergency": 1, "reload": 3},
                         changes + [{"time_s": 5.0, "kind": "reload", "seq": 3}])
        book = update_alarms(book, later)
        text = _text(render(_demo_status(time_s=5.0, current_kind="reload", stale=False,
                                         maps_published={"emergency": 1}),
                            alarms=book, width=120), width=120)
        assert "EMERGENCY  x1, last 1.0 s ago, now absent" in text
        book = update_alarms(book, dict(later, time_s=20.0))
        text = _text(render(_demo_status(time_s=20.0, current_kind="reload", stale=False),
                            alarms=book, width=120), width=120)
        assert "cleared alarms: emergency x1" in text and "EMERGENCY " not in text

    def test_counts_from_the_daemon_when_the_view_started_late(self):
        st = self._st(30.0, [], {"emergency": 3, "fallback": 1},
                      [{"time_s": 25.0, "kind": "emergency"}, {"time_s": 28.0,
                                                                "kind": "fallback"}])
        book = update_alarms(None, st)
        assert book["emergency"]["count"] == 3 and book["emergency"]["raised_s"] == 25.0
        assert book["fallback"]["count"] == 1 and not book["fallback"]["cleared"]


class TestOptions:
    def test_snr_scale(self):
        assert parse_snr_scale("0:40") == (0.0, 40.0)
        assert parse_snr_scale("-5:30.5") == (-5.0, 30.5)
        for bad in ("40:0", "a:b", "0-40", "0:nan", "5:5"):
            with pytest.raises(InputError, match=r"--snr-scale=.* must be LOW:HIGH"):
                parse_snr_scale(bad)

    @pytest.mark.parametrize("args, match", [
        (["--snr-scale", "x"], "--snr-scale='x' must be LOW:HIGH"),
        (["--tx-endpoint", "localhost"], "--tx-endpoint='localhost' must be a ZeroMQ"),
        (["--clear-after", "nan"], "--clear-after=nan must be a finite number"),
    ])
    def test_bad_flags_are_one_line(self, capsys, args, match):
        assert main(["watch", "--once", *args]) == 2
        err = capsys.readouterr().err
        assert err.count("\n") == 1 and match in err

    def test_once_with_a_silent_transmitter_endpoint(self):
        out = io.StringIO()
        assert watch("tcp://127.0.0.1:1", once=True, duration_s=0.3, out=out,
                     tx_endpoint="tcp://127.0.0.1:2") == 1
        assert "no status from tcp://127.0.0.1:1" in out.getvalue()


def test_detail_and_history_numbers():
    """The remaining figures: silence in seconds, the map's effective frame, each change's
    link time, last frame, estimate age, dropped and undecodable message counts."""
    st = _demo_status(protocol_errors={"acks": {"forged": 3}}, estimate_age_s=0.25)
    body = "\n".join(_screen(st, 160, 50, silent_s=9.4, bad_messages={"too_large": 2}))
    assert "no status message for 9 s (wall clock)" in body
    assert "map seq 8 emergency from frame 904" in body  # the map's effective_frame
    for t, seq in ((14.0, 8), (13.0, 7), (4.0, 2), (0.0, 0)):
        assert f"{t:6.1f} {seq:>4}  " in body
    assert "last frame 900" in body and "estimate age 0.25 s" in body
    assert "daemon dropped acks forged 3" in body
    assert "2 undecodable status messages (too_large 2)" in body
