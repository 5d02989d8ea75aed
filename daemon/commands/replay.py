"""``brimline replay FILE``: a recording through the daemon's decision path, offline.

FILE is an estimate recording (``.brlog``, rotated parts follow it) or a SigMF IQ capture
(``NAME``, ``NAME.sigmf-meta`` or ``NAME.sigmf-data``, through the receiver). The run is
:func:`brimline.daemon.runtime.offline.replay_offline`: the link controller of ``--config``
(defaults without it), with every ``--set KEY=VALUE`` applied before validation, on the
estimates' own times. Same recording and settings, same maps, byte for byte.

``--against KEY=VALUE`` (repeatable) runs the recording a second time with those keys changed
on top of the first run's settings and prints both summaries side by side, with the first step
where the two runs decided differently.

Outputs: the end summary on stdout; a progress bar on stderr (a terminal only, not with
``--quiet``); ``-o FILE.jsonl`` for the decisions and maps
(:func:`brimline.daemon.runtime.offline.result_lines`); ``--export FILE.npz`` or ``.csv`` for
estimates, decisions and maps (:mod:`brimline.daemon.wire.export`); ``--publish`` serves the
maps and status on the config's sockets while the replay runs (pace it with ``--speed`` so a
follower or ``brimline watch`` can keep up).
"""

from __future__ import annotations

import argparse
import math
import sys
from pathlib import Path
from typing import Sequence

from tqdm import tqdm

from brimline.daemon.errors import InputError
from brimline.daemon.runtime.config import load_config
from brimline.daemon.runtime.offline import (
    Comparison,
    OfflineResult,
    ReplayPublisher,
    Window,
    compare_results,
    replay_offline,
    result_lines,
    result_tables,
    source_epoch,
)
from brimline.daemon.wire.export import write_export, write_jsonl

__all__ = ["configure", "run", "add_source_flags", "window_of", "summary_text",
           "comparison_text", "progress_bar", "run_offline"]

_PROGRESS_EVERY = 64  # estimates between two progress bar updates


def add_source_flags(parser: argparse.ArgumentParser) -> None:
    """The flags ``replay`` and ``report`` share: the recording, config, overrides, window."""
    parser.add_argument("recording", metavar="FILE",
                        help="estimate recording (.brlog) or SigMF IQ capture")
    parser.add_argument("--config", metavar="C",
                        help="daemon config (YAML); default: every key at its default")
    parser.add_argument("--set", dest="overrides", action="append", default=[],
                        metavar="KEY=VALUE",
                        help="override one config key (dotted path, YAML value), e.g. "
                             "--set estimator.tau_s=0.5; repeatable")
    parser.add_argument("--from", dest="from_s", type=float, metavar="S",
                        help="replay estimates from this recorded time, s")
    parser.add_argument("--to", dest="to_s", type=float, metavar="S",
                        help="replay estimates before this recorded time, s")
    parser.add_argument("--frames", metavar="FIRST:LAST",
                        help="replay only these frame numbers (inclusive; either may be empty)")
    parser.add_argument("--quiet", action="store_true", help="no progress bar")


def configure(parser: argparse.ArgumentParser) -> None:
    """Add the flags of ``brimline replay``."""
    add_source_flags(parser)
    parser.add_argument("--against", action="append", default=[], metavar="KEY=VALUE",
                        help="what-if: replay again with this key changed (on top of --set) "
                             "and compare; repeatable")
    parser.add_argument("--speed", type=float, metavar="X",
                        help="paced playback at X times the recorded rate (default: as fast "
                             "as possible)")
    parser.add_argument("-o", "--output", metavar="FILE.jsonl",
                        help="write decisions and maps as JSON Lines")
    parser.add_argument("--export", metavar="FILE.npz|FILE.csv",
                        help="write estimates, decisions and maps for analysis elsewhere")
    parser.add_argument("--publish", action="store_true",
                        help="serve maps and status on the config's sockets while replaying")


def window_of(args: argparse.Namespace) -> Window:
    """The replay window of ``--from``, ``--to`` and ``--frames``.

    Raises
    ------
    InputError
        A malformed ``--frames`` or an empty window.
    """
    first = last = None
    if args.frames is not None:
        a, colon, b = args.frames.partition(":")
        try:
            first = int(a) if a.strip() else None
            last = int(b) if b.strip() else None
        except ValueError:
            colon = ""
        if not colon:
            raise InputError(f"--frames={args.frames!r} must be FIRST:LAST frame numbers "
                             f"(either may be empty), e.g. 100:500")
    return Window(start_s=args.from_s, stop_s=args.to_s, first_frame=first, last_frame=last)


def progress_bar(quiet: bool, label: str) -> tqdm:
    """A tqdm bar on stderr, off with ``quiet`` or when stderr is not a terminal."""
    return tqdm(total=None, file=sys.stderr, unit=" frames", desc=label, leave=False,
                disable=quiet or not sys.stderr.isatty(), dynamic_ncols=True)


def run_offline(args: argparse.Namespace, overrides: Sequence[str], *, label: str,
                keep_snr: bool = False, **kwargs) -> OfflineResult:
    """One offline run of ``args.recording`` with a progress bar (the shared part of
    ``replay`` and ``report``)."""
    with progress_bar(args.quiet, label) as bar:
        shown = [0]

        def on_progress(done: int, total: int | None) -> None:
            if done - shown[0] >= _PROGRESS_EVERY:
                if total is not None and bar.total != total:
                    bar.total = total
                bar.update(done - shown[0])
                shown[0] = done

        return replay_offline(args.config, args.recording, overrides=list(overrides),
                              window=window_of(args),
                              on_progress=None if bar.disable else on_progress,
                              keep_snr=keep_snr, **kwargs)


def _num(v, fmt: str, unit: str = "") -> str:
    if v is None or (isinstance(v, float) and not math.isfinite(v)):
        return "-"
    return f"{format(v, fmt)}{unit}"


def _rows(r: OfflineResult) -> list[tuple[str, str]]:
    s = r.summary
    rejected = ", ".join(f"{k} {v}" for k, v in s.rejected.items()) or "none"
    kinds = ", ".join(f"{k} {v}" for k, v in s.maps_by_kind.items()) or "none"
    source = {k: v for k, v in s.source_counters.items() if k != "frames"}
    src = ", ".join(f"{k} {v}" for k, v in source.items()) or "none"
    return [
        ("settings", " ".join(r.settings) or "(config as given)"),
        ("frames", f"{s.frames} replayed, {s.accepted} used, {_num(s.duration_s, '.2f')} s"),
        ("rejected", rejected),
        ("source notes", src),
        ("maps", f"{s.maps} ({kinds})"),
        ("changes", _num(s.changes_per_min, ".1f", " per minute")),
        ("rate", f"mean {_num(s.rate_mean_bits, '.1f')}, min {_num(s.rate_min_bits, '.0f')}, "
                 f"max {_num(s.rate_max_bits, '.0f')} bits/symbol"),
        ("mean rate", _num(None if s.rate_mean_bps is None else s.rate_mean_bps / 1e6, ".3f",
                           " Mbit/s")),
        ("map margin", f"mean {_num(s.margin_mean_db, '+.2f')}, min "
                       f"{_num(s.margin_min_db, '+.2f')} dB"),
        ("live margin", f"mean {_num(s.live_margin_mean_db, '+.2f')}, min "
                        f"{_num(s.live_margin_min_db, '+.2f')} dB over target"),
        ("below target", f"{_num(s.time_below_target_s, '.2f')} s"),
        ("header errors", str(s.header_errors)),
        ("goodput", _num(None if s.goodput_bps is None else s.goodput_bps / 1e6, ".3f",
                         " Mbit/s") if s.goodput_bps is not None else "not recorded"),
    ]


def summary_text(result: OfflineResult) -> str:
    """The end summary of one run, one figure per line."""
    lines = [f"replay summary: {result.source} ({result.source_kind}, epoch {result.epoch})"]
    lines += [f"  {name:14s} {value}" for name, value in _rows(result)]
    return "\n".join(lines)


def comparison_text(cmp: Comparison) -> str:
    """Two runs side by side, then where they first decided differently."""
    ra, rb = _rows(cmp.a), _rows(cmp.b)
    width = max(28, max(len(v) for _n, v in ra))
    lines = [f"what-if: {cmp.a.source}",
             f"  {'':14s} {'A':{width}s}  B"]
    for (name, va), (_n, vb) in zip(ra, rb):
        lines.append(f"  {name:14s} {va:{width}s}  {vb}")
    d = cmp.divergence
    if d is None:
        lines.append("  first divergence: none, the runs decided alike throughout")
    else:
        lines += [f"  first divergence: step {d.index}, frame {d.frame}, t={d.time_s:.3f} s",
                  f"    A: {d.a_kind}: {d.a_reason}",
                  f"    B: {d.b_kind}: {d.b_reason}"]
    if not cmp.same_frames:
        lines.append("  note: the runs replayed different estimates")
    return "\n".join(lines)


def run(args: argparse.Namespace) -> int:
    """Replay (and compare); returns the exit code."""
    if args.speed is not None and not (math.isfinite(args.speed) and args.speed > 0):
        raise InputError(f"--speed={args.speed} must be a positive number")
    for flag, path, suffixes in (("-o", args.output, (".jsonl",)),
                                 ("--export", args.export, (".npz", ".csv"))):
        if path is not None and Path(path).suffix not in suffixes:
            raise InputError(f"{flag} {path}: name the file {' or '.join(suffixes)}")
    if args.publish and args.against:
        raise InputError("--publish serves one run; leave out --against")
    extra = {}
    publisher = None
    if args.publish:
        config = load_config(args.config, overrides=args.overrides)
        publisher = ReplayPublisher(config, source_epoch(args.recording))
        extra["on_step"] = publisher.on_step
        extra["sleep"] = publisher.wait
        ends = publisher.endpoints()
        print(f"publishing maps on {ends['maps']}, status on {ends['status']}", file=sys.stderr,
              flush=True)
    try:
        result = run_offline(args, args.overrides, label="A" if args.against else "replay",
                             keep_snr=args.export is not None, speed=args.speed, **extra)
    finally:
        if publisher is not None:
            publisher.close()
    if args.output is not None:
        write_jsonl(args.output, result_lines(result))
    if args.export is not None:
        write_export(args.export, result_tables(result))
    if args.against:
        other = run_offline(args, [*args.overrides, *args.against], label="B",
                            speed=args.speed)
        print(comparison_text(compare_results(result, other)))
    else:
        print(summary_text(result))
    return 0
