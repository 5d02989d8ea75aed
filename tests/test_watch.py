"""The operators' view: pure rendering of a status dict, and the plain-line fallback."""

from __future__ import annotations

import io
import queue
import threading
import time

import numpy as np
from _service_fakes import ScriptedDriver, loopback_config
from rich.console import Console

from brimline.daemon.commands.run import end_summary
from brimline.daemon.records import LoadMap
from brimline.daemon.runtime.status import Change, build_status, summary_line
from brimline.daemon.views.watch import band_chart, render, watch


def _text(renderable, width=110) -> str:
    console = Console(width=width, record=True, file=io.StringIO(), force_terminal=False)
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
    for needed in ("400 in, 396 used", "non_finite 4", "+2.4 dB", "seq 12", "emergency",
                   "20 tones below downshift margin", "EMERGENCY", "bits/symbol", "Mbit/s",
                   "acked seq 12"):
        assert needed in text, needed


def test_band_chart_marks_faded_tones_as_unloaded():
    st = _status()
    chart = band_chart(st["band"]["snr_db"], st["band"]["bits"]).plain
    bits_row = [line for line in chart.splitlines() if line.startswith("bits")][0]
    cells = bits_row[len("bits    "):]
    assert len(cells) == 100
    assert set(cells[10:30]) == {"·"} and set(cells[:10]) == {"6"}


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
    bits_rows = [ln for ln in text.splitlines() if "bits " in ln and "·" in ln]
    assert bits_rows and all(len(ln) <= 60 for ln in text.splitlines())


def test_power_row_marks_boosted_and_unloaded_groups():
    chart = band_chart([20.0, 20.0, 3.0], [6, 6, 0], [2.0, 0.0, None]).plain
    row = [ln for ln in chart.splitlines() if ln.startswith("power")][0]
    assert row[len("power   "):] == "+= "


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
    assert "goodput" not in _text(render(plain)) + summary_line(plain) + end_summary(plain)


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
