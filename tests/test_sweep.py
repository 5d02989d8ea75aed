"""brimline sweep: the grid, the settings, and a real local Dask cluster of 2 worker processes
over 2 recordings x 2 settings, with a failing task reported by name while the others finish.
No timing is asserted; the cluster run only has to end."""

import csv
import importlib.util
import sys
from pathlib import Path

import pytest

from brimline.daemon.commands import cli
from brimline.daemon.commands.sweep import write_figure
from brimline.daemon.errors import ConfigError, InputError
from brimline.daemon.runtime.config import Config
from brimline.daemon.runtime.sweep import (
    TaskResult,
    apply_setting,
    grid_settings,
    parse_grid,
    replay_summary,
    run_sweep,
)

REPLAY = Path(__file__).resolve().parents[1] / "replay"
IQ = str(REPLAY / "link-demo")
ESTIMATES = str(REPLAY / "kestrel_lowmarsh_estimates.brlog")


class TestGrid:
    def test_values_are_typed_as_yaml_reads_them(self):
        grid = parse_grid(["estimator.tau_s=0.1,1e-2", "loading.mode=rate,margin",
                           "change.min_gain_bits=2,4"])
        assert grid == {"estimator.tau_s": [0.1, 0.01], "loading.mode": ["rate", "margin"],
                        "change.min_gain_bits": [2, 4]}
        assert len(grid_settings(grid)) == 8
        assert grid_settings({}) == [{}]

    @pytest.mark.parametrize("items, match", [
        (["estimator.tau_s"], r"--grid 'estimator.tau_s': expected KEY=V1,V2"),
        (["=1,2"], r"expected KEY=V1,V2"),
        (["a=1", "a=2"], r"--grid a: given twice"),
        (["a=[1"], r"--grid a: value '\[1' is not a YAML scalar"),
    ])
    def test_bad_items(self, items, match):
        with pytest.raises(InputError, match=match):
            parse_grid(items)

    @pytest.mark.parametrize("setting, match", [
        ({"estimator.nope": 1}, r"estimator.nope=1: no such config key"),
        ({"nope.tau_s": 1}, r"nope.tau_s=1: no config section 'nope'"),
        ({"estimator.tau_s": "fast"}, r"estimator.tau_s='fast'"),
        ({"fallback.bits": 9}, r"^fallback.bits=9: is not one of loading.bits="),
    ])
    def test_bad_settings_name_key_and_value(self, setting, match):
        with pytest.raises(ConfigError, match=match):
            apply_setting(Config(), setting)

    def test_setting_reaches_the_config(self):
        assert apply_setting(Config(), {"estimator.tau_s": 0.5}).estimator.tau_s == 0.5


def test_task_runs_a_recording_through_the_controller():
    summary = replay_summary(Config(), IQ, {})
    assert summary["frames"] == summary["accepted"] == 30 and summary["maps"] >= 1
    assert summary == replay_summary(Config(), IQ, {})  # same recording and setting, same figures


def test_sweep_on_two_workers_reports_a_failing_task_by_name(tmp_path, capsys):
    broken = tmp_path / "broken.brlog"
    broken.write_bytes(b"not a recording at all")
    out = tmp_path / "sweep.csv"
    code = cli.main(["sweep", IQ, ESTIMATES, str(broken), "--workers", "2",
                     "--grid", "estimator.tau_s=0.1,1.0", "-o", str(out)])
    err = capsys.readouterr().err
    assert code == 1
    rows = list(csv.DictReader(out.open()))
    assert len(rows) == 6
    ok = [r for r in rows if r["status"] == "ok"]
    failed = [r for r in rows if r["status"] == "failed"]
    assert {(Path(r["recording"]).name, r["estimator.tau_s"]) for r in ok} == {
        ("link-demo", "0.1"), ("link-demo", "1.0"),
        ("kestrel_lowmarsh_estimates.brlog", "0.1"), ("kestrel_lowmarsh_estimates.brlog", "1.0")}
    assert all(int(r["frames"]) > 0 and r["error"] == "" for r in ok)
    assert {r["estimator.tau_s"] for r in failed} == {"0.1", "1.0"}
    assert all(r["recording"] == str(broken) and "broken.brlog" in r["error"] for r in failed)
    lines = [line for line in err.splitlines() if "FAILED" in line]
    assert len(lines) == 2 and all(str(broken) in line and "estimator.tau_s=" in line
                                   for line in lines)
    assert "2 of 6 tasks failed" in err
    if importlib.util.find_spec("matplotlib") is not None:  # the figure is optional
        assert (tmp_path / "sweep.png").stat().st_size > 0
    else:
        assert "figure skipped" in err


def test_run_sweep_returns_results_in_grid_order():
    results = run_sweep(Config(), [IQ], [{"estimator.tau_s": 0.1}, {"estimator.tau_s": 1.0}],
                        workers=1)
    assert [r.setting for r in results] == [{"estimator.tau_s": 0.1}, {"estimator.tau_s": 1.0}]
    assert all(r.ok for r in results)


def test_sweep_on_an_existing_scheduler(tmp_path, capsys):
    """--scheduler: a scheduler started apart from the sweep (here a local cluster of one
    worker process on loopback) runs the tasks and stays up afterwards."""
    import logging

    from dask import distributed
    with distributed.LocalCluster(n_workers=1, threads_per_worker=1, processes=True,
                                  dashboard_address=None, silence_logs=logging.ERROR,
                                  host="127.0.0.1") as cluster:
        out = tmp_path / "s.csv"
        code = cli.main(["sweep", IQ, "--grid", "estimator.tau_s=0.1,1.0", "--scheduler",
                         cluster.scheduler_address, "-o", str(out), "--no-figure"])
        assert code == 0, capsys.readouterr().err
        assert [r["status"] for r in csv.DictReader(out.open())] == ["ok", "ok"]
        assert len(cluster.scheduler_info["workers"]) == 1  # still up
    assert not (tmp_path / "s.png").exists()


@pytest.mark.parametrize("argv, match", [
    (["--grid", "estimator.tau_s=-1"], r"brimline sweep: error: estimator.tau_s=-1"),
    (["--grid", "estimator.what=1"], r"estimator.what=1: no such config key"),
    (["--grid", "oops"], r"--grid 'oops': expected KEY=V1,V2"),
])
def test_bad_settings_stop_before_the_cluster(argv, match, capsys, tmp_path):
    assert cli.main(["sweep", IQ, "-o", str(tmp_path / "s.csv"), *argv]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and __import__("re").search(match, err[0]), err


def test_missing_recording_is_one_line(capsys, tmp_path):
    assert cli.main(["sweep", str(tmp_path / "nothing.brlog"), "--grid", "estimator.tau_s=1"]) == 2
    assert "nothing.brlog: no such recording" in capsys.readouterr().err


def test_missing_dask_gives_the_install_hint(monkeypatch, capsys, tmp_path):
    monkeypatch.setitem(sys.modules, "dask", None)
    assert cli.main(["sweep", IQ, "--grid", "estimator.tau_s=1", "-o",
                     str(tmp_path / "s.csv")]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "pip install 'brimline[sweep]'" in err[0]


def test_nested_figures_become_columns(tmp_path):
    from brimline.daemon.commands.sweep import write_table
    results = [TaskResult("a", {"k": 1}, summary={"frames": 3, "rejected": {"outlier": 2}}),
               TaskResult("b", {"k": 2}, error="b: unreadable")]
    write_table(results, ["k"], tmp_path / "t.csv")
    rows = list(csv.DictReader((tmp_path / "t.csv").open()))
    assert rows[0]["rejected.outlier"] == "2" and rows[1]["status"] == "failed"
    assert rows[1]["error"] == "b: unreadable" and rows[1]["frames"] == ""


def test_figure_is_skipped_without_matplotlib(monkeypatch, tmp_path):
    monkeypatch.setitem(sys.modules, "matplotlib", None)
    note = write_figure([TaskResult(IQ, {"a": 1}, summary={"rate_mean_bits": 1.0})],
                        tmp_path / "f.png")
    assert note.startswith("figure skipped: matplotlib is not installed")
    assert not (tmp_path / "f.png").exists()
