"""``brimline sweep RECORDINGS... --grid KEY=V1,V2 ...``: every (recording, setting) on Dask.

Each recording (an estimate recording or a SigMF IQ capture) is replayed through the link
controller under the config (``--config``, or the defaults) with each setting of the grid (the
Cartesian product of the ``--grid`` values), one task per pair, on ``dask.distributed``: a local
cluster of ``--workers`` processes, or the scheduler at ``--scheduler`` (loopback or a real
cluster whose workers have brimline installed). See :mod:`brimline.daemon.runtime.sweep`.

Output: one CSV row per task (``recording``, the grid keys, ``status``, ``error``, then the
task's figures) and one PNG figure of the mean rate and the map changes per minute per
setting, one line per recording (matplotlib, imported here only; without it the figure is
skipped with a note). A progress line per finished task goes to stderr. A failed task names its
recording and setting there and in its CSV row; the others run on, and the exit code is 1.
Settings and recordings are checked before the cluster starts (exit 2, one line).
"""

from __future__ import annotations

import argparse
import csv
import math
import sys
from pathlib import Path
from typing import Sequence

from brimline.daemon.errors import InputError, RecordingError
from brimline.daemon.runtime.config import Config, config_with, load_config
from brimline.daemon.runtime.offline import recording_kind
from brimline.daemon.runtime.sweep import (
    TaskResult,
    flat_summary,
    grid_settings,
    parse_grid,
    run_sweep,
    summary_columns,
)

__all__ = ["configure", "run", "write_table", "write_figure"]


def configure(parser: argparse.ArgumentParser) -> None:
    """Add the flags of ``brimline sweep``."""
    parser.add_argument("recordings", nargs="+", metavar="RECORDING",
                        help="estimate recordings (.brlog) and SigMF captures (NAME or "
                             "NAME.sigmf-meta)")
    parser.add_argument("--grid", action="append", default=[], metavar="KEY=V1,V2",
                        help="a config key and its values (repeat for more keys; every "
                             "combination runs), e.g. estimator.tau_s=0.1,1.0")
    parser.add_argument("--config", metavar="FILE",
                        help="base daemon config (YAML); default: the built-in defaults")
    where = parser.add_mutually_exclusive_group()
    where.add_argument("--workers", type=int, default=2, metavar="N",
                       help="worker processes of the local Dask cluster (default 2)")
    where.add_argument("--scheduler", metavar="ADDRESS",
                       help="an existing Dask scheduler, e.g. tcp://10.0.0.5:8786")
    parser.add_argument("-o", "--out", default="sweep.csv", metavar="CSV",
                        help="results table (default sweep.csv)")
    figure = parser.add_mutually_exclusive_group()
    figure.add_argument("--figure", metavar="PNG",
                        help="results figure (default: the table's name with .png)")
    figure.add_argument("--no-figure", action="store_true", help="write no figure")


def _check_recordings(recordings: Sequence[str]) -> None:
    for rec in recordings:
        p = Path(rec)
        if recording_kind(rec) == "iq":
            meta = p.with_suffix(".sigmf-meta") if p.suffix else p.with_name(
                p.name + ".sigmf-meta")
            if not meta.is_file():
                raise InputError(f"{rec}: no such SigMF capture ({meta.name} missing)")
        elif not p.is_file():
            raise InputError(f"{rec}: no such recording")


def _setting_text(setting: dict) -> str:
    return " ".join(f"{k}={v}" for k, v in setting.items()) or "(base config)"


def run(args: argparse.Namespace) -> int:
    """Run the sweep; 0 when every task succeeded, 1 when some failed."""
    config = load_config(args.config) if args.config else Config()
    grid = parse_grid(args.grid)
    settings = grid_settings(grid)
    for setting in settings:
        config_with(config, setting)  # a bad key or value stops here, before the cluster
    _check_recordings(args.recordings)
    total = len(args.recordings) * len(settings)
    done = [0]

    def progress(result: TaskResult) -> None:
        done[0] += 1
        head = f"[{done[0]}/{total}] {result.recording} {_setting_text(result.setting)}"
        if result.ok:
            rate = result.summary.get("rate_mean_bits")
            shown = "no map" if rate is None else f"mean rate {rate:.1f} bits/symbol"
            print(f"{head}: {shown}", file=sys.stderr)
        else:
            print(f"{head}: FAILED: {result.error}", file=sys.stderr)

    results = run_sweep(config, args.recordings, settings, workers=args.workers,
                        scheduler=args.scheduler, on_result=progress)
    out = Path(args.out)
    write_table(results, list(grid), out)
    print(f"table: {out} ({len(results)} rows)", file=sys.stderr)
    if not args.no_figure:
        fig_path = Path(args.figure) if args.figure else out.with_suffix(".png")
        note = write_figure(results, fig_path)
        print(note, file=sys.stderr)
    failed = [r for r in results if not r.ok]
    if failed:
        print(f"{len(failed)} of {len(results)} tasks failed", file=sys.stderr)
        return 1
    return 0


def write_table(results: Sequence[TaskResult], keys: Sequence[str], path: Path) -> None:
    """One CSV row per task: recording, the grid keys, status, error, the task's figures.

    Raises
    ------
    RecordingError
        The file cannot be written.
    """
    figures = summary_columns(results)
    try:
        with open(path, "w", newline="", encoding="utf-8") as f:
            writer = csv.writer(f)
            writer.writerow(["recording", *keys, "status", "error", *figures])
            for r in results:
                summary = flat_summary(r.summary)
                writer.writerow([r.recording, *(r.setting.get(k, "") for k in keys),
                                 "ok" if r.ok else "failed", r.error or "",
                                 *("" if summary.get(k) is None else summary[k]
                                   for k in figures)])
    except OSError as exc:
        raise RecordingError(f"{path}: cannot write the sweep table: {exc}") from exc


def write_figure(results: Sequence[TaskResult], path: Path) -> str:
    """Mean rate and map changes per minute per setting, a line per recording; returns a note.

    matplotlib is optional: without it nothing is written and the note says so.
    """
    try:
        # optional: figures only; the table does not need it
        import matplotlib
        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
    except ImportError:
        return f"figure skipped: matplotlib is not installed (pip install matplotlib); {path}" \
               f" not written"
    labels: list[str] = []
    for r in results:
        text = _setting_text(r.setting)
        if text not in labels:
            labels.append(text)
    recordings = list(dict.fromkeys(r.recording for r in results))
    fig, (ax_rate, ax_maps) = plt.subplots(2, 1, figsize=(8, 6), sharex=True)
    x = range(len(labels))
    for rec in recordings:
        by_label = {_setting_text(r.setting): r.summary or {} for r in results
                    if r.recording == rec}
        for ax, key in ((ax_rate, "rate_mean_bits"), (ax_maps, "changes_per_min")):
            y = [by_label.get(label, {}).get(key) for label in labels]
            y = [math.nan if v is None else float(v) for v in y]
            ax.plot(list(x), y, marker="o", label=Path(rec).name)
    ax_rate.set_ylabel("mean rate (bits/OFDM symbol)")
    ax_maps.set_ylabel("map changes (1/min)")
    ax_maps.set_xticks(list(x))
    ax_maps.set_xticklabels(labels, rotation=20, ha="right", fontsize=8)
    ax_rate.legend(fontsize=8)
    for ax in (ax_rate, ax_maps):
        ax.grid(True, alpha=0.3)
    fig.suptitle("brimline sweep: settings against recordings")
    fig.tight_layout()
    try:
        fig.savefig(path, dpi=100)
    except OSError as exc:
        raise RecordingError(f"{path}: cannot write the sweep figure: {exc}") from exc
    finally:
        plt.close(fig)
    return f"figure: {path}"
