"""``brimline run``: run the daemon from a config file (or only check the file).

``--check`` builds everything a run needs except sockets and a radio (:func:`check_summary`)
and then tries the files a run writes (:func:`check_paths`): the recording must not exist yet
(the writer never overwrites) and its folder must take a new file; the state file, when present,
must load, and its folder must take a new file (state is saved by write-then-rename). The
probes create and remove one hidden temporary file per folder and leave nothing behind.

Exit codes of a run (a service supervisor keys its restart policy on them): 0 after a clean
stop (SIGTERM, SIGINT, ``--duration``, or a finite source that ended); 2 for anything the user
got wrong, reported in one line before the daemon starts (config, files, a port in use, a
missing optional library); :data:`EXIT_SOURCE_FAILED` when the estimate source failed during
the run (the daemon keeps serving the last map, and the fallback once estimates are stale,
until it is stopped, with the ``driver_failed`` alarm raised); 130 for a KeyboardInterrupt that
arrives outside the loop; 1 (a traceback) only for a bug.
"""

from __future__ import annotations

import argparse
import datetime
import json
import logging
import math
import os
import signal
import sys
import tempfile
import threading
import time
from pathlib import Path
from typing import Sequence

from brimline.daemon.commands.cli import RF_CAUTION
from brimline.daemon.core.controller import Change
from brimline.daemon.errors import InputError, StateError
from brimline.daemon.net.curve import check_server_keys, exposed_endpoints
from brimline.daemon.runtime.assemble import build_core, make_driver
from brimline.daemon.runtime.config import Config, load_config
from brimline.daemon.runtime.service import BEHIND_WARN_S, Service
from brimline.daemon.runtime.status import summary_line
from brimline.daemon.wire.recording import recording_paths
from brimline.daemon.wire.state import StateStore
from brimline.drivers.sources.radio import probe_radio

__all__ = ["configure", "run", "JsonLogFormatter", "check_summary", "check_paths", "end_summary",
           "timeline_fields", "security_warnings", "EXIT_SOURCE_FAILED"]

#: Exit code of a run whose estimate source failed before the daemon was stopped.
EXIT_SOURCE_FAILED = 3

_TIMELINE_LINES = 50  # maps listed in the run summary (the newest)


class JsonLogFormatter(logging.Formatter):
    """One JSON object per log record: time (wall clock, UTC, ISO 8601), level, logger, message,
    and the record's structured ``fields`` (``event``, ``link_time_s``, ``seq``, ``kind``,
    ``cause``, ``reason``, ``bits_before``, ``bits_after``, ``margin_achieved_db``,
    ``margin_target_db``, ... as the service logs them; see
    :mod:`brimline.daemon.runtime.service`). A record without fields has ``event``
    ``"message"``."""

    def format(self, record: logging.LogRecord) -> str:
        out = {
            "time": datetime.datetime.fromtimestamp(record.created, datetime.timezone.utc)
            .isoformat(timespec="milliseconds"),
            "level": record.levelname.lower(),
            "logger": record.name,
            "event": "message",
            "message": record.getMessage(),
        }
        fields = getattr(record, "fields", None)
        if isinstance(fields, dict):
            for key, value in fields.items():
                if key not in ("time", "level", "logger", "message"):
                    out[key] = _plain(value)
        if record.exc_info:
            out["exception"] = self.formatException(record.exc_info)
        return json.dumps(out, ensure_ascii=False)


def _plain(value):
    """A log field as JSON can carry it: non-finite floats become None."""
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    if isinstance(value, dict):
        return {k: _plain(v) for k, v in value.items()}
    return value


def configure(parser: argparse.ArgumentParser) -> None:
    """Add the flags of ``brimline run``."""
    parser.add_argument("--config", required=True, metavar="FILE", help="daemon config (YAML)")
    parser.add_argument("--duration", type=float, default=None, metavar="S",
                        help="stop after S seconds of link time (default: until Ctrl-C or the "
                             "source ends)")
    parser.add_argument("--check", action="store_true",
                        help="validate the config, print a one-line summary and exit")
    parser.add_argument("--log-json", action="store_true",
                        help="log one JSON object per line on stderr (for machines)")
    parser.add_argument("--quiet", action="store_true",
                        help="no live status line, warnings and errors only")


def _setup_logging(as_json: bool, quiet: bool) -> logging.Handler:
    handler = logging.StreamHandler(sys.stderr)
    if as_json:
        handler.setFormatter(JsonLogFormatter())
    else:
        handler.setFormatter(logging.Formatter(
            "%(asctime)s.%(msecs)03d %(levelname)-7s %(message)s", datefmt="%H:%M:%S"))
    root = logging.getLogger("brimline")
    root.addHandler(handler)
    root.setLevel(logging.WARNING if quiet else logging.INFO)
    root.propagate = False
    return handler


def check_summary(path: str, config: Config) -> str:
    """Build everything a run needs except sockets (and a radio); return the OK line.

    The driver is constructed and closed without producing a frame: a SigMF recording's meta and
    data file are opened and checked (:func:`brimline.drivers.sources.iq.read_sigmf`), a replay
    file's header is read, nothing is received. A radio is opened and closed again without
    touching a setting (:func:`brimline.drivers.sources.radio.probe_radio`: pyadi-iio missing or
    no device at the URI is an error); socket sources are not bound.

    Raises
    ------
    BrimlineError
        Whatever the config's parts reject (one line each).
    """
    plan, loader, _estimator, _change = build_core(config)
    d = config.driver
    if d.kind == "radio":  # open and close the device only: no tuning, no transmission
        if d.radio.backend == "iio":  # the emulated radio needs no probe (and has no device)
            probe_radio(d.radio.uri, d.radio.device)
    elif not d.live:  # a socket source would bind its endpoint; the others are cheap
        make_driver(config, plan).close()
    fb = config.fallback
    return (f"{path}: OK: driver {d.kind}, {plan.data_tones.size} data tones of "
            f"{plan.fft_size}, loading {config.loading.mode} (gap {loader.gap_db:.2f} dB), "
            f"fallback {fb.bits} bits after {fb.stale_after_s:g} s")


def security_warnings(config: Config) -> list[str]:
    """Read every CURVE key file the config names; return the warnings for the operator.

    Returns
    -------
    list of str
        One line per client key file that will be skipped and per endpoint other hosts can
        reach while CURVE is off (wildcard, ``0.0.0.0`` or a non-loopback host).

    Raises
    ------
    InputError
        The daemon's secret key file or the clients directory is unusable (names the file).
    """
    pub = config.publish
    warnings = check_server_keys(pub)
    endpoints = {"publish.map_endpoint": pub.map_endpoint,
                 "publish.snapshot_endpoint": pub.snapshot_endpoint,
                 "publish.ack_endpoint": pub.ack_endpoint,
                 "status.endpoint": config.status.endpoint}
    return warnings + exposed_endpoints(endpoints, pub.curve_secret_key is not None)


def check_paths(config: Config) -> list[str]:
    """Try the record and state paths of ``config`` as a run would use them.

    Parameters
    ----------
    config : Config
        A loaded config (relative paths already resolved against its folder).

    Returns
    -------
    list of str
        One line per problem, each naming the key and its value (``record.path=...``,
        ``record.iq.path=...``, ``service.state_path=...``); empty when a run could write them.

    Notes
    -----
    Writes at most one empty hidden file per folder and removes it at once. The check is a
    snapshot: a disk can still fill up or a file appear between the check and the run.
    """
    problems = []
    record = config.record.path
    if record is not None:
        existing = recording_paths(record)
        if existing:
            problems.append(f"record.path={record}: {existing[0]} exists already and a run "
                            f"never overwrites a recording; move it or choose another path")
        else:
            why = _cannot_create_in(Path(record).parent)
            if why is not None:
                problems.append(f"record.path={record}: {why}")
    capture = config.record.iq.path
    if capture is not None:
        base = Path(capture)
        if base.suffix in (".sigmf-meta", ".sigmf-data"):
            base = base.with_suffix("")
        for ext in (".sigmf-meta", ".sigmf-data"):
            existing = base.with_name(base.name + ext)
            if existing.exists():
                problems.append(f"record.iq.path={capture}: {existing} exists already and a "
                                f"run never overwrites a capture; move it or choose another "
                                f"path")
                break
        else:
            why = _cannot_create_in(base.parent)
            if why is not None:
                problems.append(f"record.iq.path={capture}: {why}")
    state = config.service.state_path
    if state is not None:
        try:
            StateStore(state).load()
        except StateError as exc:
            problems.append(f"service.state_path={state}: {exc}")
        else:
            why = _cannot_create_in(Path(state).parent, made=True)
            if why is not None:
                problems.append(f"service.state_path={state}: {why}")
    return problems


def _cannot_create_in(folder: Path, *, made: bool = False) -> str | None:
    """Why a new file cannot be created in ``folder`` (tried with a probe), or None.

    With ``made`` the run makes a missing folder itself (the state file's): then the probe
    goes into the nearest folder that exists on the way up.
    """
    if made:
        while not folder.exists() and folder.parent != folder:
            folder = folder.parent
    elif not folder.is_dir():
        return f"folder {folder} does not exist"
    try:
        fd, probe = tempfile.mkstemp(dir=folder, prefix=".brimline-check-")
    except OSError as exc:
        return f"cannot create a file in {folder}: {exc.strerror or exc}"
    os.close(fd)
    os.unlink(probe)
    return None


def _check(args: argparse.Namespace, config: Config, warnings: list[str]) -> int:
    """``run --check``: the OK line on stdout; the security ``warnings`` and the parts'
    warnings (a SigMF recording's, ...) on stderr, the latter as they would be logged at start."""
    root = logging.getLogger("brimline")
    before = (root.level, root.propagate)
    handler = _setup_logging(args.log_json, quiet=True)
    try:
        line = check_summary(args.config, config)
        for warning in warnings:
            print(f"{args.config}: warning: {warning}", file=sys.stderr)
        problems = check_paths(config)
        for problem in problems:  # each on its own line, as the CLI prints a BrimlineError
            print(f"brimline run: error: {problem}", file=sys.stderr)
        if problems:
            return 2
        print(line)
    finally:
        root.removeHandler(handler)
        root.setLevel(before[0])
        root.propagate = before[1]
    return 0


def end_summary(status: dict, timeline: Sequence[Change] = (), *,
                behind_s: float = 0.0) -> str:
    """The lines printed when a run ends: frames, rejections, maps by kind, final figures (the
    link's goodput and errors, the outer loop's offset and outcomes, when present), and the
    timeline of maps.

    Parameters
    ----------
    status : dict
        The last status message.
    timeline : sequence of Change
        The run's published changes, oldest first (:attr:`Service.timeline`): one line each,
        link time, kind, bits per symbol before -> after, reason.
    behind_s : float
        Most the paced source fell behind the wall clock, s (said when above
        :data:`~brimline.daemon.runtime.service.BEHIND_WARN_S`).
    """
    fr = status.get("frames", {})
    rejected = dict(fr.get("rejected", {}))
    if fr.get("decode_errors"):
        rejected["undecodable"] = fr["decode_errors"]
    rej = ", ".join(f"{k} {v}" for k, v in sorted(rejected.items())) or "none"
    maps = status.get("maps_published", {})
    maps_txt = ", ".join(f"{k} {v}" for k, v in sorted(maps.items())) or "none"
    rate = status.get("rate", {})
    data_bps = rate.get("data_rate_bps")
    line_bps = rate.get("line_rate_bps", rate.get("rate_bps"))
    margin = status.get("margin") or {}
    headroom, target = margin.get("headroom_db", status.get("margin_db")), margin.get("target_db")
    drv = status.get("driver", {})
    lines = [
        "run summary",
        f"  source          {drv.get('name', '-')} ({drv.get('state', '-')})"
        + (f": {drv['error']}" if drv.get("error") else "")
        + (f", up to {behind_s:.2f} s behind real time" if behind_s > BEHIND_WARN_S else ""),
        f"  frames          {fr.get('received', 0)} received, {fr.get('accepted', 0)} used",
        f"  rejected        {rej}",
        f"  maps published  {sum(maps.values())} ({maps_txt})",
        f"  final rate      {rate.get('bits_per_symbol', 0)} bits/symbol"
        + (f", data rate {data_bps / 1e6:.3f} Mbit/s" if data_bps is not None else "")
        + (f", line rate {line_bps / 1e6:.3f} Mbit/s" if line_bps is not None else ""),
        "  final margin    "
        + ("-" if headroom is None else f"headroom {headroom:+.2f} dB")
        + ("" if target is None else f" above the target margin {target:g} dB"),
    ]
    link = status.get("link")
    if link:
        gp, fer, ber = (link.get(k) for k in ("goodput_bps", "frame_error_rate",
                                              "bit_error_rate"))
        lines.append(
            f"  link            goodput {'-' if gp is None else f'{gp / 1e6:.3f} Mbit/s'}, "
            f"frame errors {link.get('frame_errors', 0)} of {link.get('frames', 0)} "
            f"(FER {'-' if fer is None else f'{fer:.3g}'}), "
            f"BER {'-' if ber is None else f'{ber:.3g}'}")
    outer = status.get("outer")
    if outer:
        off, ofer = outer.get("offset_db"), outer.get("fer")
        lines.append(
            f"  outer loop      {'on' if outer.get('active') else 'off'}, offset "
            f"{'-' if off is None else f'{off:+.2f} dB'}, {outer.get('outcomes', 0)} outcomes "
            f"({outer.get('errored', 0)} errored), FER {'-' if ofer is None else f'{ofer:.3g}'}"
            f" over the last {outer.get('window', 0)} (target {outer.get('target_fer')})")
    lines += [
        f"  alarms          {', '.join(status.get('alarms', [])) or 'none'}",
    ]
    dropped = {f"{sock} {reason}": n for sock, reasons in
               dict(status.get("protocol_errors") or {}).items()
               for reason, n in dict(reasons).items()}
    if dropped:
        lines.append("  dropped msgs    " + ", ".join(f"{k} {v}"
                                                     for k, v in sorted(dropped.items())))
    if timeline:
        shown = list(timeline)[-_TIMELINE_LINES:]
        total = sum(maps.values())
        lines.append("  maps            link time, kind, bits/symbol before -> after, reason"
                     + (f" (the last {len(shown)} of {total})" if total > len(shown) else ""))
        for c in shown:
            before = "-" if c.bits_before is None else str(c.bits_before)
            after = "-" if c.bits_after is None else str(c.bits_after)
            lines.append(f"  {c.time_s:9.2f} s  {c.kind:<9} {before:>5} -> {after:<5} "
                         f"{c.reason}")
    return "\n".join(lines)


def timeline_fields(timeline: Sequence[Change]) -> list[dict]:
    """The timeline of maps as JSON-ready dicts (the ``run_end`` log event's ``maps``)."""
    return [{"link_time_s": c.time_s, "seq": c.seq, "kind": c.kind, "cause": c.cause,
             "bits_before": c.bits_before, "bits_after": c.bits_after, "reason": c.reason}
            for c in timeline]


def run(args: argparse.Namespace) -> int:
    """Run (or check) the daemon; returns the exit code."""
    if args.duration is not None and not args.duration > 0:
        raise InputError(f"--duration={args.duration} must be a positive number of seconds")
    config = load_config(args.config)
    warnings = security_warnings(config)
    if args.check:
        return _check(args, config, warnings)

    handler = _setup_logging(args.log_json, args.quiet)
    for line in warnings:
        logging.getLogger("brimline.service").warning("%s", line)
    if config.driver.kind == "radio":
        print(RF_CAUTION, file=sys.stderr, flush=True)
    stop = threading.Event()

    def _on_signal(signum, _frame):
        logging.getLogger("brimline.service").info("%s: finishing the current step",
                                                   signal.Signals(signum).name)
        stop.set()

    old = {s: signal.signal(s, _on_signal) for s in (signal.SIGINT, signal.SIGTERM)}
    last_line = [float("-inf")]

    def _on_status(status: dict) -> None:
        now = time.monotonic()
        if not args.quiet and now - last_line[0] >= 1.0:
            last_line[0] = now
            print(summary_line(status), flush=True)

    try:
        with Service(config) as service:
            service.run(args.duration, stop=stop, on_status=_on_status)
        final = service.last_status or {}
        logging.getLogger("brimline.service").info(
            "run ended at link time %.2f s: %d maps", final.get("time_s", math.nan),
            len(service.timeline),
            extra={"fields": {"event": "run_end", "link_time_s": final.get("time_s"),
                              "behind_max_s": round(service.behind_max_s, 3),
                              "maps": timeline_fields(service.timeline)}})
        if not args.quiet:
            print(end_summary(final, service.timeline, behind_s=service.behind_max_s),
                  flush=True)
        # The source failed during the run: the daemon kept serving the last or fallback map
        # until stopped; a distinct code lets a supervisor tell this stop from a clean one.
        return EXIT_SOURCE_FAILED if service.driver_state == "failed" else 0
    finally:
        for s, h in old.items():
            signal.signal(s, h)
        logging.getLogger("brimline").removeHandler(handler)
