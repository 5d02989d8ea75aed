"""``brimline report FILE -o NAME.png``: pictures of a recording replayed offline.

The recording is replayed as ``brimline replay`` does (same flags for the config, overrides and
window), keeping every estimate's SNR, and drawn by
:func:`brimline.daemon.views.report.render_report`: SNR waterfall, bits per tone, rate and
margin with the map changes, and a per-tone snapshot at ``--at`` seconds. ``-o`` names the
file: ``.png``, ``.pdf`` or ``.html``. ``--export`` also writes the tables behind the picture
(``.npz`` or ``.csv``, :mod:`brimline.daemon.wire.export`).

Needs matplotlib: ``pip install 'brimline[report]'``.
"""

from __future__ import annotations

import argparse
import math
from pathlib import Path

from brimline.daemon.commands.replay import add_source_flags, run_offline, summary_text
from brimline.daemon.errors import InputError
from brimline.daemon.runtime.offline import result_tables
from brimline.daemon.views.report import REPORT_SUFFIXES, render_report
from brimline.daemon.wire.export import write_export

__all__ = ["configure", "run"]


def configure(parser: argparse.ArgumentParser) -> None:
    """Add the flags of ``brimline report``."""
    add_source_flags(parser)
    parser.add_argument("-o", "--output", required=True, metavar="NAME.png",
                        help="the report: .png, .pdf or .html")
    parser.add_argument("--at", dest="at_s", type=float, metavar="SECONDS",
                        help="time of the per-tone snapshot, s (default: the end)")
    parser.add_argument("--title", help="page title (default: the recording's name)")
    parser.add_argument("--export", metavar="FILE.npz|FILE.csv",
                        help="also write estimates, decisions and maps")


def run(args: argparse.Namespace) -> int:
    """Replay and draw; returns the exit code."""
    out = Path(args.output)
    if out.suffix not in REPORT_SUFFIXES:
        raise InputError(f"-o {out}: name the report .png, .pdf or .html")
    if args.at_s is not None and not math.isfinite(args.at_s):
        raise InputError(f"--at={args.at_s} must be a time in seconds")
    if args.export is not None and Path(args.export).suffix not in (".npz", ".csv"):
        raise InputError(f"--export {args.export}: name the file .npz or .csv")
    result = run_offline(args, args.overrides, label="report", keep_snr=True)
    text = summary_text(result)
    render_report(result, out, at_s=args.at_s, title=args.title,
                  summary_lines=text.splitlines())
    if args.export is not None:
        write_export(args.export, result_tables(result))
    if not args.quiet:
        print(f"{out}: report of {result.summary.frames} frames, {result.summary.maps} maps")
    return 0
