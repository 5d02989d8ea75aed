"""``brimline run``: run the daemon from a config file (or only check the file)."""

from __future__ import annotations

import argparse
import datetime
import json
import logging
import signal
import sys
import threading
import time

from brimline.daemon.commands.cli import RF_CAUTION
from brimline.daemon.errors import InputError
from brimline.daemon.net.curve import check_server_keys, exposed_endpoints
from brimline.daemon.runtime.config import Config, load_config
from brimline.daemon.runtime.service import Service, build_core, make_driver
from brimline.daemon.runtime.status import summary_line

__all__ = ["configure", "run", "JsonLogFormatter", "check_summary", "end_summary",
           "security_warnings"]


class JsonLogFormatter(logging.Formatter):
    """One JSON object per log record: time (UTC, ISO 8601), level, logger, message."""

    def format(self, record: logging.LogRecord) -> str:
        out = {
            "time": datetime.datetime.fromtimestamp(record.created, datetime.timezone.utc)
            .isoformat(timespec="milliseconds"),
            "level": record.levelname.lower(),
            "logger": record.name,
            "message": record.getMessage(),
        }
        if record.exc_info:
            out["exception"] = self.formatException(record.exc_info)
        return json.dumps(out, ensure_ascii=False)


def configure(parser: argparse.ArgumentParser) -> None:
    """Add the flags of ``brimline run``."""
    parser.add_argument("--config", required=True, metavar="FILE", help="daemon config (YAML)")
    parser.add_argument("--duration", type=float, default=None, metavar="S",
                        help="stop after S seconds (default: until Ctrl-C or the source ends)")
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
        handler.setFormatter(logging.Formatter("%(asctime)s %(levelname)-7s %(message)s",
                                               datefmt="%H:%M:%S"))
    root = logging.getLogger("brimline")
    root.addHandler(handler)
    root.setLevel(logging.WARNING if quiet else logging.INFO)
    root.propagate = False
    return handler


def check_summary(path: str, config: Config) -> str:
    """Build everything a run needs except sockets (and a radio); return the OK line.

    Raises
    ------
    BrimlineError
        Whatever the config's parts reject (one line each).
    """
    plan, loader, _estimator, _change = build_core(config)
    d = config.driver
    if d.kind != "radio":  # opening a radio would touch the hardware; the others are cheap
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


def end_summary(status: dict) -> str:
    """The lines printed when a run ends: frames, rejections, maps by kind, final figures."""
    fr = status.get("frames", {})
    rejected = dict(fr.get("rejected", {}))
    if fr.get("decode_errors"):
        rejected["undecodable"] = fr["decode_errors"]
    rej = ", ".join(f"{k} {v}" for k, v in sorted(rejected.items())) or "none"
    maps = status.get("maps_published", {})
    maps_txt = ", ".join(f"{k} {v}" for k, v in sorted(maps.items())) or "none"
    rate = status.get("rate", {})
    rbps = rate.get("rate_bps")
    margin = status.get("margin_db")
    drv = status.get("driver", {})
    lines = [
        "run summary",
        f"  source          {drv.get('name', '-')} ({drv.get('state', '-')})"
        + (f": {drv['error']}" if drv.get("error") else ""),
        f"  frames          {fr.get('received', 0)} received, {fr.get('accepted', 0)} used",
        f"  rejected        {rej}",
        f"  maps published  {sum(maps.values())} ({maps_txt})",
        f"  final rate      {rate.get('bits_per_symbol', 0)} bits/symbol"
        + (f", {rbps / 1e6:.3f} Mbit/s" if rbps is not None else ""),
        "  final margin    " + ("-" if margin is None else f"{margin:+.2f} dB"),
        f"  alarms          {', '.join(status.get('alarms', [])) or 'none'}",
    ]
    dropped = {f"{sock} {reason}": n for sock, reasons in
               dict(status.get("protocol_errors") or {}).items()
               for reason, n in dict(reasons).items()}
    if dropped:
        lines.append("  dropped msgs    " + ", ".join(f"{k} {v}"
                                                     for k, v in sorted(dropped.items())))
    return "\n".join(lines)


def run(args: argparse.Namespace) -> int:
    """Run (or check) the daemon; returns the exit code."""
    if args.duration is not None and not args.duration > 0:
        raise InputError(f"--duration={args.duration} must be a positive number of seconds")
    config = load_config(args.config)
    warnings = security_warnings(config)
    if args.check:
        summary = check_summary(args.config, config)
        for line in warnings:
            print(f"{args.config}: warning: {line}", file=sys.stderr)
        print(summary)
        return 0

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
        if not args.quiet:
            print(end_summary(final), flush=True)
        return 0
    finally:
        for s, h in old.items():
            signal.signal(s, h)
        logging.getLogger("brimline").removeHandler(handler)
