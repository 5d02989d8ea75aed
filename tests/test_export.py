"""Exports (brimline.daemon.wire.export): npz and CSV round trips, JSON Lines."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest

from brimline.daemon.errors import InputError
from brimline.daemon.wire.export import (
    ExportTables,
    csv_paths,
    json_safe,
    read_export,
    write_export,
    write_jsonl,
)

TONES = np.array([-3, -2, -1, 1, 2, 3], dtype=np.int16)


def _tables(rng, frames=7, maps=3) -> ExportTables:
    n = TONES.size
    return ExportTables(
        tone_index=TONES,
        estimates={"frame": np.arange(frames), "time_s": np.arange(frames) * 0.02 + 1 / 3,
                   "snr_db": rng.normal(20, 5, (frames, n)).astype(np.float32)},
        decisions={"frame": np.arange(frames), "time_s": np.arange(frames) * 0.02,
                   "kind": ["keep", "rejected", "reload", "keep", "bit_swap", "keep", "keep"],
                   "cause": ["keep", "stale_frame", "gain", "", "sag", "keep", "keep"],
                   "reason": ["a, with a comma", 'quote "x"', "", "é", "b", "c", "d"],
                   "bits_per_symbol": np.arange(frames) * 10,
                   "margin_db": [math.nan, math.inf, -math.inf, 0.1, 1e-300, -2.5, 3.0],
                   "live_margin_db": rng.normal(0, 1, frames), "seq": np.arange(frames) - 1,
                   "fallback": [False, True, False, False, True, False, False]},
        maps={"seq": np.arange(maps), "frame": [0, 2, 4], "time_s": [0.0, 0.04, 0.08],
              "kind": ["reload", "fallback", "bit_swap"], "cause": ["gain", "fallback", "sag"],
              "reason": ["x", "y", "z"],
              "effective_frame": [4, 6, 8], "total_bits": [12, 12, 14],
              "margin_db": [1.5, math.nan, 0.25], "gap_db": [9.8] * maps,
              "fallback": [False, True, False],
              "bits": rng.integers(0, 9, (maps, n)),
              "power_lin": rng.uniform(0, 2, (maps, n)).astype(np.float32)})


def _assert_same(a: ExportTables, b: ExportTables) -> None:
    assert np.array_equal(a.tone_index, b.tone_index)
    for table in ("estimates", "decisions", "maps"):
        ca, cb = a.table(table), b.table(table)
        assert ca.keys() == cb.keys(), table
        for name in ca:
            assert ca[name].dtype == cb[name].dtype, (table, name)
            assert ca[name].shape == cb[name].shape, (table, name)
            if ca[name].dtype.kind == "f":
                assert np.array_equal(ca[name], cb[name], equal_nan=True), (table, name)
            else:
                assert np.array_equal(ca[name], cb[name]), (table, name)


@pytest.mark.parametrize("suffix", [".npz", ".csv"])
def test_round_trip_is_exact(tmp_path, rng, suffix):
    tables = _tables(rng)
    written = write_export(tmp_path / f"run{suffix}", tables)
    assert all(p.exists() for p in written)
    _assert_same(tables, read_export(tmp_path / f"run{suffix}"))


@pytest.mark.parametrize("suffix", [".npz", ".csv"])
def test_an_export_without_the_cause_column_still_reads(tmp_path, rng, suffix):
    """Exports written before decisions and maps carried ``cause`` read back as they were."""
    full = _tables(rng)
    older = ExportTables(
        tone_index=full.tone_index, estimates=full.table("estimates"),
        decisions={k: v for k, v in full.table("decisions").items() if k != "cause"},
        maps={k: v for k, v in full.table("maps").items() if k != "cause"})
    write_export(tmp_path / f"old{suffix}", older)
    back = read_export(tmp_path / f"old{suffix}")
    _assert_same(older, back)
    assert "cause" not in back.table("decisions") and "cause" not in back.table("maps")


def test_csv_is_three_files_with_tone_columns(tmp_path, rng):
    write_export(tmp_path / "run.csv", _tables(rng))
    paths = csv_paths(tmp_path / "run.csv")
    assert sorted(p.name for p in paths.values()) == ["run.decisions.csv",
                                                      "run.estimates.csv", "run.maps.csv"]
    head = paths["estimates"].read_text().splitlines()[0].split(",")
    assert head == ["frame", "time_s"] + [f"snr_db[{t}]" for t in TONES]


def test_npz_needs_no_pickles(tmp_path, rng):
    write_export(tmp_path / "run.npz", _tables(rng))
    with np.load(tmp_path / "run.npz", allow_pickle=False) as data:
        assert data["maps.kind"].tolist() == ["reload", "fallback", "bit_swap"]
        assert data["maps.bits"].shape == (3, TONES.size)


def test_empty_run_round_trips(tmp_path, rng):
    tables = _tables(rng, frames=0, maps=0)
    tables = ExportTables(tone_index=TONES, estimates=tables.estimates,
                          decisions={k: v[:0] for k, v in tables.decisions.items()},
                          maps={k: np.asarray(v)[:0] for k, v in tables.maps.items()})
    write_export(tmp_path / "e.npz", tables)
    _assert_same(tables, read_export(tmp_path / "e.npz"))


def test_bad_names_and_files_are_input_errors(tmp_path, rng):
    with pytest.raises(InputError, match=r"run.txt: name the file .npz or .csv"):
        write_export(tmp_path / "run.txt", _tables(rng))
    with pytest.raises(InputError, match="cannot read export"):
        read_export(tmp_path / "none.npz")
    (tmp_path / "x.estimates.csv").write_text("frame,volts\n1,2\n")
    with pytest.raises(InputError, match="column 'volts' is not part of a brimline export"):
        read_export(tmp_path / "x.csv")


def test_jsonl_is_strict_json(tmp_path):
    n = write_jsonl(tmp_path / "o.jsonl", [{"a": np.float32(1.5), "b": math.nan,
                                             "c": np.arange(3), "d": np.bool_(True)}, {}])
    lines = (tmp_path / "o.jsonl").read_text().splitlines()
    assert n == 2 and json.loads(lines[0]) == {"a": 1.5, "b": None, "c": [0, 1, 2], "d": True}
    assert json_safe({"x": (math.inf,)}) == {"x": [None]}
