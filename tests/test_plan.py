"""``brimline plan``: reading SNR files, flags over config, output, and one-line errors."""

from __future__ import annotations

import json
import math
import re
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from brimline.daemon.commands.cli import RF_CAUTION, main
from brimline.daemon.commands.plan import bit_chart, parse_bit_list, read_snr_db
from brimline.daemon.core.loading import load_margin, load_rate, waterfill
from brimline.daemon.core.qam import qam_gap_db
from brimline.daemon.errors import InputError

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "replay" / "kestrel_ridge_snr_db.txt"


def run_plan(capsys, *args):
    try:
        code = main(["plan", *map(str, args)])
    except SystemExit as exc:  # argparse errors
        code = exc.code
    out = capsys.readouterr()
    return code, out.out, out.err


def write(tmp_path, name, text):
    p = tmp_path / name
    p.write_text(text)
    return p


class TestDemoProfile:
    def test_readme_command_works(self, capsys):
        code, out, err = run_plan(capsys, DEMO)
        assert code == 0 and err == ""
        assert "bits per symbol" in out and "bits per tone" in out
        assert "RF cautions" in out

    def test_file_is_reproducible(self, tmp_path):
        """The shipped profile is exactly what its seeded generator writes."""
        sys.path.insert(0, str(ROOT / "replay"))
        try:
            import make_kestrel_ridge as gen
        finally:
            sys.path.pop(0)
        snr_db = gen.profile(np.random.default_rng(gen.SEED))
        np.testing.assert_allclose(read_snr_db(DEMO), snr_db, atol=0.005)
        assert DEMO.read_text().splitlines()[0].startswith("snr_db")
        assert snr_db.size == 256

    def test_json_matches_the_library(self, capsys):
        """Default settings: gap of uncoded QAM at SER 1e-7 plus the 3 dB target margin."""
        code, out, _ = run_plan(capsys, DEMO, "--json")
        assert code == 0
        doc = json.loads(out)
        snr = 10 ** (read_snr_db(DEMO) / 10)
        ref = load_rate(snr, bits=range(9), gap_db=qam_gap_db(1e-7) + 3.0)
        assert doc["bits"] == ref.bits.tolist()
        assert doc["total_bits"] == ref.total_bits == sum(doc["bits"])
        assert doc["total_power"] == pytest.approx(ref.total_power)
        assert doc["achieved_margin_db"] == pytest.approx(ref.margin_db)
        assert doc["effective_gap_db"] == pytest.approx(qam_gap_db(1e-7) + 3.0)
        assert doc["gap_db"] == pytest.approx(qam_gap_db(1e-7))
        assert doc["target_ser"] == 1e-7 and doc["target_margin_db"] == 3.0
        assert len(doc["power"]) == 256
        assert "margin_db" not in doc  # the target and the achieved margin are named apart

    def test_effective_gap_is_spelled_out(self, capsys):
        """``--gap-db 0`` loads at 3 dB because of the default target margin: the output says
        so (gap - coding gain + target margin = effective gap)."""
        code, out, _ = run_plan(capsys, DEMO, "--json", "--gap-db", "0")
        doc = json.loads(out)
        assert code == 0
        assert (doc["gap_db"], doc["target_ser"], doc["coding_gain_db"],
                doc["target_margin_db"], doc["effective_gap_db"]) == (0.0, None, 0.0, 3.0, 3.0)
        snr = 10 ** (read_snr_db(DEMO) / 10)
        assert doc["bits"] == load_rate(snr, bits=range(9), gap_db=3.0).bits.tolist()
        code, out, _ = run_plan(capsys, DEMO, "--gap-db", "0", "--coding-gain-db", "1.5",
                                "--margin-db", "2")
        assert "gap        0.50 dB = gap 0.00 dB - coding gain 1.5 dB + target margin 2 dB" \
            in out
        assert "headroom   the required powers could all grow" in out


class TestModesAndFlags:
    def test_margin_mode(self, capsys):
        code, out, _ = run_plan(capsys, DEMO, "--json", "--mode", "margin", "--target-bits",
                                1200, "--gap-db", 9.8, "--margin-db", 0)
        doc = json.loads(out)
        assert code == 0 and doc["total_bits"] == 1200
        ref = load_margin(10 ** (read_snr_db(DEMO) / 10), target_bits=1200, gap_db=9.8)
        assert doc["achieved_margin_db"] == pytest.approx(ref.margin_db)

    def test_waterfill_mode(self, capsys):
        code, out, _ = run_plan(capsys, DEMO, "--json", "--mode", "waterfill", "--gap-db", 0,
                                "--margin-db", 0, "--cap-db", 3)
        doc = json.loads(out)
        wf = waterfill(10 ** (read_snr_db(DEMO) / 10), gap_db=0.0, cap_db=3.0)
        assert doc["water_level"] == pytest.approx(wf.water_level)
        assert doc["capacity_bits"] == pytest.approx(wf.capacity_bits)
        assert doc["waterfill_power"] == pytest.approx(wf.power.tolist())
        assert doc["cap_db"] == 3.0
        assert doc["total_power"] == pytest.approx(sum(doc["power"]))
        assert all(p == 0 for b, p in zip(doc["bits"], doc["power"]) if b == 0)

    def test_text_output_of_each_mode(self, capsys):
        for extra in ([], ["--mode", "margin", "--target-bits", "900"], ["--mode", "waterfill"]):
            code, out, _ = run_plan(capsys, DEMO, *extra)
            assert code == 0 and "carries" in out

    def test_holes_bits_and_target_ser(self, capsys):
        code, out, _ = run_plan(capsys, DEMO, "--json", "--bits", "0,1,2,4,6,8",
                                "--target-ser", "1e-6", "--budget-db", "-3")
        doc = json.loads(out)
        assert set(doc["bits"]) <= {0, 1, 2, 4, 6, 8}
        assert doc["effective_gap_db"] == pytest.approx(qam_gap_db(1e-6) + 3.0)
        assert doc["total_power"] <= 256 * 10 ** -0.3 * (1 + 1e-9)

    def test_nothing_loaded_gives_null_margin(self, capsys, tmp_path):
        """Non-finite numbers become JSON null (documented in the command's docstring)."""
        p = write(tmp_path, "dead.txt", "-150\n-150\n")
        code, out, _ = run_plan(capsys, p, "--json")
        doc = json.loads(out)
        assert code == 0 and doc["total_bits"] == 0 and doc["achieved_margin_db"] is None
        assert doc["cap_db"] is None
        code, out, _ = run_plan(capsys, p)
        assert "unlimited" in out

    def test_config_then_flags(self, capsys, tmp_path):
        cfg = write(tmp_path, "c.yaml", "loading:\n  mode: margin\n  target_bits: 700\n"
                                        "  gap_db: 8.0\n  margin_db: 0.0\n")
        code, out, _ = run_plan(capsys, DEMO, "--json", "--config", cfg)
        doc = json.loads(out)
        assert doc["mode"] == "margin" and doc["total_bits"] == 700
        assert doc["effective_gap_db"] == pytest.approx(8.0)
        code, out, _ = run_plan(capsys, DEMO, "--json", "--config", cfg, "--mode", "rate",
                                "--margin-db", "2")
        doc = json.loads(out)
        assert doc["mode"] == "rate" and doc["total_bits"] > 700
        assert doc["effective_gap_db"] == pytest.approx(10.0)
        assert doc["target_margin_db"] == 2.0

    def test_npy_input(self, capsys, tmp_path):
        p = tmp_path / "snr.npy"
        np.save(p, np.array([20.0, 25.0, 5.0]))
        code, out, _ = run_plan(capsys, p, "--json", "--gap-db", "9.8", "--margin-db", "0")
        assert code == 0 and json.loads(out)["bits"] == load_rate(
            10 ** (np.array([20.0, 25.0, 5.0]) / 10), gap_db=9.8).bits.tolist()

    def test_comments_header_and_blank_lines(self, tmp_path):
        p = write(tmp_path, "s.txt", "# made by hand\nsnr_db\n\n10.5  # first\n  -3\n\n7\n")
        assert read_snr_db(p).tolist() == [10.5, -3.0, 7.0]

    def test_help_carries_the_rf_caution(self, capsys):
        code, out, _ = run_plan(capsys, "--help")
        assert code == 0 and "RF caution" in out.replace("\n", " ")
        assert RF_CAUTION.split()[0] in out


class TestBitList:
    def test_forms(self):
        assert parse_bit_list("0,1,2,4,6,8") == [0, 1, 2, 4, 6, 8]
        assert parse_bit_list("0-10") == list(range(11))
        assert parse_bit_list("0-2,4,6") == [0, 1, 2, 4, 6]

    @pytest.mark.parametrize("text", ["", "1,2", "0,2,2", "0,x", "0-17", "3-1", "0,-1"])
    def test_bad(self, text):
        with pytest.raises(InputError, match="--bits"):
            parse_bit_list(text)


def test_chart_shape():
    bits = np.array([0] * 8 + [8] * 8 + [3] * 16)
    rows = bit_chart(bits, width=16)
    assert len(rows) == 8 + 2  # 8 bit levels, the base line, the tone span
    assert "2 tones per column" in rows[-1] and rows[-1].strip().startswith("tone 0 .. 31")
    assert all(len(r) == len(rows[0]) for r in rows[:-1])


# --------------------------------------------------------------------------- one-line errors


@pytest.mark.parametrize("name, text, args, match", [
    ("empty.txt", "", [], r"empty.txt: no SNR values"),
    ("comments.txt", "# only\n\n", [], r"no SNR values"),
    ("nan.txt", "snr\n10\nnan\n", [], r"nan.txt line 3: SNR nan dB must be finite"),
    ("inf.txt", "10\n-inf\n", [], r"inf.txt line 2: SNR -inf dB must be finite"),
    ("text.txt", "header\n10\nabc\n", [], r"text.txt line 3: 'abc' is not an SNR in dB"),
    ("huge.txt", "10\n900\n", [], r"line 2: SNR 900.0 dB is beyond"),
    ("typo.txt", "# x\n1O.5\n12\n", [], r"typo.txt line 2: '1O.5' is not an SNR in dB"),
    ("ok.txt", "10\n20\n", ["--bits", "0,3,2"], r"--bits='0,3,2' must be ascending"),
    ("ok.txt", "10\n20\n", ["--mode", "margin"], r"--mode margin needs --target-bits"),
    ("ok.txt", "10\n20\n", ["--mode", "margin", "--target-bits", "40"],
     r"target_bits=40 is more than the \d+ bits"),
    ("ok.txt", "10\n20\n", ["--target-ser", "0.9"], r"target_ser=0.9 must be in"),
    ("ok.txt", "10\n20\n", ["--budget-db", "inf"], r"--budget-db=inf must be finite"),
])
def test_bad_input_is_one_line(capsys, tmp_path, name, text, args, match):
    p = write(tmp_path, name, text)
    code, out, err = run_plan(capsys, p, *args)
    assert code == 2 and out == ""
    lines = err.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in err
    assert re.search(match, lines[0]), lines[0]


@pytest.mark.parametrize("args, match", [
    (["--mode", "fast"], r"invalid choice: 'fast'"),
    (["--gap-db", "3", "--target-ser", "1e-6"], r"not allowed with argument"),
    (["--gap-db", "abc"], r"--gap-db: invalid float value"),
])
def test_bad_flags_are_one_line(capsys, args, match):
    code, _, err = run_plan(capsys, DEMO, *args)
    assert code == 2 and len(err.strip().splitlines()) == 1
    assert re.search(match, err), err


def test_missing_directory_binary_npy(capsys, tmp_path):
    for target, match in [(tmp_path / "nope.txt", "no such file"),
                          (tmp_path, "is a directory"),
                          (write(tmp_path, "b.txt", ""), "no SNR values")]:
        code, _, err = run_plan(capsys, target)
        assert code == 2 and match in err and len(err.strip().splitlines()) == 1
    (tmp_path / "bin.txt").write_bytes(b"\xff\xfe\x00\x81")
    code, _, err = run_plan(capsys, tmp_path / "bin.txt")
    assert code == 2 and "not a text file" in err
    np.save(tmp_path / "two.npy", np.zeros((2, 2)))
    code, _, err = run_plan(capsys, tmp_path / "two.npy")
    assert code == 2 and "1-D numeric array" in err
    np.save(tmp_path / "nan.npy", np.array([1.0, np.nan]))
    code, _, err = run_plan(capsys, tmp_path / "nan.npy")
    assert code == 2 and "element 1" in err
    (tmp_path / "junk.npy").write_bytes(b"not numpy")
    code, _, err = run_plan(capsys, tmp_path / "junk.npy")
    assert code == 2 and "not a readable .npy" in err


@pytest.mark.parametrize("yaml_text, match", [
    ("loading:\n  gap_db: '9.8'\n", r"line 2: loading.gap_db='9.8'"),
    ("loading: [1, 2\n", r"YAML syntax error"),
    ("loading:\n  bits: [0, 1, 1]\n", r"loading.bits=\[0, 1, 1\]"),
    ("loading:\n  mode: margin\n", r"margin needs target_bits"),
    ("loading:\n  cap_db: .nan\n", r"loading.cap_db"),
    ("link: 3\n", r"link"),
])
def test_bad_config_is_one_line(capsys, tmp_path, yaml_text, match):
    cfg = write(tmp_path, "c.yaml", yaml_text)
    code, _, err = run_plan(capsys, DEMO, "--config", cfg)
    assert code == 2 and len(err.strip().splitlines()) == 1 and "Traceback" not in err
    assert re.search(match, err), err


def test_subprocess_success_and_error(tmp_path):
    ok = subprocess.run([sys.executable, "-m", "brimline.daemon", "plan", str(DEMO), "--json"],
                        capture_output=True, text=True, timeout=60)
    assert ok.returncode == 0 and json.loads(ok.stdout)["total_bits"] > 0
    bad = write(tmp_path, "bad.txt", "12\n13\nnot-a-number\n")
    out = subprocess.run([sys.executable, "-m", "brimline.daemon", "plan", str(bad)],
                         capture_output=True, text=True, timeout=60)
    assert out.returncode == 2 and out.stdout == ""
    assert out.stderr.strip().splitlines() == [
        f"brimline plan: error: {bad} line 3: 'not-a-number' is not an SNR in dB"]


def test_ascii_terminal(tmp_path):
    """A terminal that cannot show block characters still gets a chart (no encoding crash)."""
    out = subprocess.run([sys.executable, "-m", "brimline.daemon", "plan", str(DEMO)],
                         capture_output=True, timeout=60, env={"PYTHONIOENCODING": "ascii",
                                                               "PATH": "/usr/bin:/bin"})
    assert out.returncode == 0, out.stderr
    assert b"#" in out.stdout


def test_snr_strip_follows_the_profile():
    from brimline.daemon.commands.plan import snr_strip

    strip = snr_strip(np.array([0.0] * 4 + [30.0] * 4 + [15.0] * 4), width=12)
    assert len(strip) == 12
    assert strip[0] == " " and strip[4] in "\u2588@" and strip[0] != strip[8] != strip[4]
    assert snr_strip(np.full(5, 20.0), width=5) == " " * 5


# --------------------------------------------------------------------------- every claim


def _plan_text_and_json(capsys, *args):
    code, out, _ = run_plan(capsys, DEMO, *args)
    assert code == 0
    code, js, _ = run_plan(capsys, DEMO, "--json", *args)
    assert code == 0
    return out, json.loads(js)


def _line(out: str, key: str) -> str:
    return next(ln for ln in out.splitlines() if ln.startswith(f"  {key}"))


def _numbers(text: str) -> list[float]:
    return [float(x) for x in re.findall(r"[-+]?\d+(?:\.\d+)?(?:e[-+]?\d+)?", text)]


MODES = [[], ["--mode", "margin", "--target-bits", "1200"], ["--mode", "waterfill"]]


class TestEveryClaim:
    """Each number ``brimline plan`` prints is recomputed here from the file and the plan's
    own JSON, by formulas written out in the test (the loading conventions of
    ``core/loading.py``: power needed for b bits is gap (2^b - 1) / snr)."""

    @pytest.mark.parametrize("extra", MODES)
    def test_tones_and_snr_lines(self, capsys, extra):
        out, doc = _plan_text_and_json(capsys, *extra)
        snr_db = read_snr_db(DEMO)
        assert _line(out, "tones").split()[1].rstrip(",") == str(snr_db.size) == \
            str(doc["n_tones"])
        lo, hi, med = _numbers(_line(out, "SNR"))
        assert (lo, hi, med) == (round(snr_db.min(), 1), round(snr_db.max(), 1),
                                 round(float(np.median(snr_db)), 1))

    @pytest.mark.parametrize("extra", MODES)
    def test_carries_line(self, capsys, extra):
        out, doc = _plan_text_and_json(capsys, *extra)
        total, loaded, idle, mean = _numbers(_line(out, "carries"))
        bits = np.array(doc["bits"])
        assert total == bits.sum() == doc["total_bits"]
        assert loaded == np.count_nonzero(bits) and idle == bits.size - loaded
        assert mean == round(bits.sum() / bits.size, 2)

    @pytest.mark.parametrize("extra", MODES)
    def test_uses_line(self, capsys, extra):
        out, doc = _plan_text_and_json(capsys, *extra)
        used, budget, db = _numbers(_line(out, "uses"))
        total = float(np.sum(doc["power"]))
        assert used == pytest.approx(total, rel=1e-3)
        assert budget == 256 * 10 ** (doc["budget_db"] / 10)
        assert db == pytest.approx(10 * math.log10(total / 256), abs=0.006)

    @pytest.mark.parametrize("extra", MODES)
    def test_margins_line_is_the_per_tone_range(self, capsys, extra):
        """Per-tone margin beyond the target = 10 log10(p snr / (gap (2^b - 1))) on loaded
        tones, gap the effective gap: the printed range is their min, median and max (one
        value when all are equal), and it matches the JSON's ``tone_margin_db``."""
        out, doc = _plan_text_and_json(capsys, *extra)
        snr = 10 ** (read_snr_db(DEMO) / 10)
        b, p = np.array(doc["bits"]), np.array(doc["power"])
        on = b > 0
        gap = 10 ** (doc["effective_gap_db"] / 10)
        margins = 10 * np.log10(p[on] * snr[on] / (gap * (2.0 ** b[on] - 1)))
        assert np.allclose([m for m in doc["tone_margin_db"] if m is not None], margins)
        assert all(m is None for m, bb in zip(doc["tone_margin_db"], b) if bb == 0)
        line = _line(out, "margins")
        if "per loaded tone" in line:
            lo, hi, med = _numbers(line)
            assert (lo, hi, med) == (round(margins.min(), 2), round(margins.max(), 2),
                                     round(float(np.median(margins)), 2))
            assert doc["mode"] == "waterfill"
        else:
            value, loaded = _numbers(line)
            assert loaded == on.sum()
            assert np.allclose(margins, value, atol=0.006)  # the same on every loaded tone

    def test_waterfill_does_not_claim_one_margin_on_every_tone(self, capsys):
        out, doc = _plan_text_and_json(capsys, "--mode", "waterfill")
        assert "on every loaded tone" not in out and "on each of the" not in out
        spread = [m for m in doc["tone_margin_db"] if m is not None]
        assert max(spread) - min(spread) > 1.0  # rounding down spreads them out

    @pytest.mark.parametrize("extra", MODES)
    def test_headroom_line(self, capsys, extra):
        """Headroom = 10 log10(min(budget / sum(need), cap / max(need))) of the required
        powers need = gap (2^b - 1) / snr (no ceiling by default)."""
        out, doc = _plan_text_and_json(capsys, *extra)
        snr = 10 ** (read_snr_db(DEMO) / 10)
        b = np.array(doc["bits"])
        gap = 10 ** (doc["effective_gap_db"] / 10)
        need = np.where(b > 0, gap * (2.0 ** b - 1) / snr, 0.0)
        want = 10 * math.log10(256 / need.sum())
        (value,) = _numbers(_line(out, "headroom"))
        assert value == round(want, 2) and doc["achieved_margin_db"] == pytest.approx(want)

    def test_margin_mode_spends_the_headroom(self, capsys):
        """In margin mode every loaded tone's margin equals the headroom of its required
        powers, and the powers then fill the budget."""
        out, doc = _plan_text_and_json(capsys, "--mode", "margin", "--target-bits", "1200")
        (value,) = _numbers(_line(out, "headroom"))
        margins = [m for m in doc["tone_margin_db"] if m is not None]
        assert np.allclose(margins, doc["achieved_margin_db"])
        assert sum(doc["power"]) == pytest.approx(256, rel=1e-9)
        assert "spent it on the powers" in _line(out, "headroom")

    def test_waterfill_line(self, capsys):
        """Capacity = sum log2(1 + p snr / gap) of the water-filled powers (Cover & Thomas,
        Elements of Information Theory, 9.4, with the SNR gap); level as in the JSON."""
        out, doc = _plan_text_and_json(capsys, "--mode", "waterfill")
        level, capacity = _numbers(_line(out, "waterfill"))
        snr = 10 ** (read_snr_db(DEMO) / 10)
        gap = 10 ** (doc["effective_gap_db"] / 10)
        cap = np.sum(np.log2(1 + np.array(doc["waterfill_power"]) * snr / gap))
        assert capacity == round(cap, 1) and level == float(f"{doc['water_level']:.4g}")

    def test_chart_axis_names_its_numbering(self, capsys):
        out, doc = _plan_text_and_json(capsys)
        assert doc["tone_numbering"] == "file_order" and doc["tone_index"] == list(range(256))
        axis = next(ln for ln in out.splitlines() if ln.strip().startswith("tone "))
        assert "tone 0 .. 255 (file positions, not the link plan's tones" in axis
        assert "the link plan has 174 data tones -99..99" in _line(out, "tones")


def test_a_file_of_one_snr_per_data_tone_uses_the_daemons_numbering(capsys, tmp_path,
                                                                    monkeypatch):
    """174 values for the default plan's 174 data tones: numbered -99..99 as in maps, status
    and logs (pilots every 8th used tone from the edge and DC have no number)."""
    from brimline.drivers.link.frame import make_plan

    monkeypatch.setenv("COLUMNS", "80")  # chart of 72 columns: ceil(174 / 72) = 3 per column
    tones = make_plan().data_tones
    p = write(tmp_path, "plan174.txt", "\n".join(["20"] * tones.size))
    code, out, _ = run_plan(capsys, p)
    assert code == 0
    assert "174 data tones -99..99 (the link plan's numbering" in out
    assert "tone -99 .. 99 (data tones of the link plan; 3 tones per column)" in out
    code, js, _ = run_plan(capsys, p, "--json")
    doc = json.loads(js)
    assert doc["tone_numbering"] == "link_plan" and doc["tone_index"] == tones.tolist()


def test_settings_lines_and_snr_range(capsys):
    """The settings as printed: allowed bits, the budget as N x nominal (256 tones at 0 dB),
    the ceiling; the SNR strip's range is the file's min and max rounded to whole dB."""
    code, out, _ = run_plan(capsys, DEMO, "--budget-db", "-3", "--cap-db", "2",
                            "--bits", "0,1,2,4,6,8")
    assert code == 0
    assert _line(out, "bits") == "  bits       0,1,2,4,6,8 per tone"
    budget = 256 * 10 ** (-3 / 10)
    assert _line(out, "power") == (f"  power      budget -3 dB ({budget:.4g} x nominal tone "
                                   "power), ceiling 2 dB per tone")
    snr_db = read_snr_db(DEMO)
    strip = next(ln for ln in out.splitlines() if ln.startswith("  snr |"))
    assert strip.endswith(f"|  {snr_db.min():.0f} to {snr_db.max():.0f} dB")
