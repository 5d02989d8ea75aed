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
from brimline.daemon.runtime.config import Config, config_with
from brimline.daemon.runtime.offline import replay_offline
from brimline.daemon.runtime.sweep import (
    TaskResult,
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
    ])
    def test_bad_items(self, items, match):
        with pytest.raises(InputError, match=match):
            parse_grid(items)

    @pytest.mark.parametrize("items, match", [
        # the config's override parser reads each value (config.parse_override's messages)
        (["a=[1"], r"^--set a=\[1: value is not valid YAML"),
        (["estimator.tau s=1"], r"^--set 'estimator.tau s=1': expected KEY=VALUE"),
    ])
    def test_values_and_keys_are_read_by_the_configs_parser(self, items, match):
        with pytest.raises(ConfigError, match=match):
            parse_grid(items)

    @pytest.mark.parametrize("setting, match", [
        # the config's own validation and messages (config.config_with)
        ({"estimator.nope": 1}, r"^--set estimator.nope=1: unknown key estimator.nope"),
        ({"nope.tau_s": 1}, r"^--set nope.tau_s=1: unknown key nope"),
        ({"estimator.tau_s": "fast"},
         r"^--set estimator.tau_s='fast': estimator.tau_s='fast': Input should be a valid"),
        ({"fallback.bits": 9}, r"^--set fallback.bits=9: fallback.bits=9: is not one of "
                               r"loading.bits="),
    ])
    def test_bad_settings_name_key_and_value(self, setting, match):
        with pytest.raises(ConfigError, match=match):
            config_with(Config(), setting)

    def test_a_grid_setting_reaches_the_config(self):
        (setting,) = grid_settings(parse_grid(["estimator.tau_s=0.5"]))
        assert config_with(Config(), setting).estimator.tau_s == 0.5


def test_task_is_the_offline_replay_of_the_recording():
    summary = replay_summary(Config(), IQ, {})
    assert summary["frames"] == summary["accepted"] == 30 and summary["maps"] >= 1
    assert summary == replay_summary(Config(), IQ, {})  # same recording and setting, same figures
    # the row is brimline replay's summary of the same recording under the same setting
    setting = {"estimator.tau_s": 0.5}
    replayed = replay_offline(Config(), IQ, overrides=setting).summary
    assert replay_summary(Config(), IQ, setting) == __import__("dataclasses").asdict(replayed)


def test_a_task_with_a_bad_setting_fails_with_the_configs_message():
    with pytest.raises(ConfigError, match=r"^--set estimator.tau_s=-1.0: estimator.tau_s=-1.0"):
        replay_summary(Config(), IQ, {"estimator.tau_s": -1.0})


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
    (["--grid", "estimator.tau_s=-1"],
     r"brimline sweep: error: --set estimator.tau_s=-1: estimator.tau_s=-1: tau_s=-1.0 must "
     r"be a positive"),
    (["--grid", "estimator.what=1"], r"--set estimator.what=1: unknown key estimator.what"),
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
