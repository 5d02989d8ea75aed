"""``brimline tx``: the transmitter side. Follows the daemon's maps and sends frames to a sink.

The config is the daemon's file format: ``link`` (the tone plan), ``publish`` (the daemon's
map, snapshot and ack endpoints), ``loading`` (what maps may hold), ``tx`` (sink, power bound,
behaviour on heartbeat loss, status socket) and, for the emulated radio, ``emulated``.

Whatever ends the process (``--duration``, SIGTERM, SIGINT, an error) the transmitter is
silenced first (:meth:`brimline.daemon.runtime.transmitter.TxLoop.close`: attenuation to the
maximum, buffer destroyed, zero output), then the sockets close.
"""

from __future__ import annotations

import argparse
import logging
import signal
import sys
import threading
import time

from brimline.daemon.commands.cli import RF_CAUTION
from brimline.daemon.errors import ConfigError, InputError
from brimline.daemon.net.curve import load_keypair
from brimline.daemon.runtime.assemble import build_core, build_tx, open_sink
from brimline.daemon.runtime.config import Config, load_config
from brimline.daemon.runtime.transmitter import tx_summary_line
from brimline.drivers.link.frame import slot_samples
from brimline.drivers.sinks.sigmf import sigmf_paths

__all__ = ["configure", "run", "check_summary", "check_client_keys"]


def configure(parser: argparse.ArgumentParser) -> None:
    """Add the flags of ``brimline tx``."""
    parser.add_argument("--config", required=True, metavar="FILE",
                        help="config with link, publish, loading and tx sections (YAML)")
    parser.add_argument("--duration", type=float, default=None, metavar="S",
                        help="stop after S seconds (default: until Ctrl-C or tx.max_frames)")
    parser.add_argument("--check", action="store_true",
                        help="validate the config, print a one-line summary and exit")
    parser.add_argument("--quiet", action="store_true",
                        help="no live status line, warnings and errors only")


def check_client_keys(daemon_key: str, own_key: str) -> None:
    """Read the transmitter's CURVE key files (``tx.curve_daemon_key``, ``tx.curve_own_key``).

    Raises
    ------
    ConfigError
        One line naming the key, its file and the problem (missing, unreadable, not a key, a
        public ``.key`` file where the ``.key_secret`` one is needed).
    """
    for key, path in (("curve_daemon_key", daemon_key), ("curve_own_key", own_key)):
        try:
            pair = load_keypair(path)
        except InputError as exc:
            raise ConfigError(f"tx.{key}={exc}") from None
        if key == "curve_own_key" and pair.secret is None:
            raise ConfigError(f"tx.{key}={path}: has no secret key: give this transmitter's "
                              f".key_secret file (brimline keys), not a .key file")


def check_summary(path: str, config: Config) -> str:
    """Check what ``brimline tx`` needs without opening a socket or a radio; the OK line.

    Raises
    ------
    BrimlineError
        A part's rejection, a SigMF sink path that exists already, or a CURVE key file that
        cannot be used.
    """
    plan = build_core(config)[0]
    tx = config.tx
    try:
        slot_samples(plan, tx.frame_rate_hz, "tx.frame_rate_hz")
    except ValueError as exc:
        raise ConfigError(str(exc)) from None
    if tx.sink == "radio" and plan.center_hz != plan.center_hz:  # NaN: not set
        raise ConfigError("link.center_hz must be set to tune tx.radio")
    if tx.sink == "sigmf":
        for p in sigmf_paths(tx.path):
            if p.exists():
                raise ConfigError(f"tx.path={p}: exists already (the sink never overwrites)")
    if tx.curve_daemon_key is not None:
        check_client_keys(tx.curve_daemon_key, tx.curve_own_key)
    where = {"radio": f"radio ({tx.backend} {tx.uri})", "sigmf": f"sigmf ({tx.path})",
             "stream": f"stream ({tx.stream_pattern} {tx.stream_endpoint})"}[tx.sink]
    loss = f"{tx.on_loss} after {tx.hold_s:g} s"
    curve = "" if tx.curve_daemon_key is None else ", maps over CURVE"
    return (f"{path}: OK: tx sink {where}{curve}, {plan.data_tones.size} data tones of "
            f"{plan.fft_size}, {tx.frame_rate_hz:g} frames/s, backoff {tx.backoff_db:g} dB, "
            f"bound {tx.max_tone_db:g} dB per tone / {tx.max_total_db:g} dB total, "
            f"on heartbeat loss {loss}")


def run(args: argparse.Namespace) -> int:
    """Run (or check) the transmitter; returns the exit code."""
    if args.duration is not None and not args.duration > 0:
        raise InputError(f"--duration={args.duration} must be a positive number of seconds")
    config = load_config(args.config)
    if args.check:
        print(check_summary(args.config, config))
        return 0
    check_summary(args.config, config)
    tx = config.tx
    log = logging.getLogger("brimline")
    handler = logging.StreamHandler(sys.stderr)
    handler.setFormatter(logging.Formatter("%(asctime)s %(levelname)-7s %(message)s",
                                           datefmt="%H:%M:%S"))
    log.addHandler(handler)
    log.setLevel(logging.WARNING if args.quiet else logging.INFO)
    if tx.sink == "radio" and tx.backend == "iio":
        print(RF_CAUTION, file=sys.stderr, flush=True)
    stop = threading.Event()

    def _on_signal(signum, _frame):
        logging.getLogger("brimline.tx").info("%s: silencing the transmitter",
                                              signal.Signals(signum).name)
        stop.set()

    old = {s: signal.signal(s, _on_signal) for s in (signal.SIGINT, signal.SIGTERM)}
    timer = None
    if args.duration is not None:
        timer = threading.Timer(args.duration, stop.set)
        timer.daemon = True
        timer.start()
    try:
        plan = build_core(config)[0]
        sink = open_sink(config, plan)
        try:
            loop = build_tx(config, plan, sink)
        except BaseException:
            sink.close()  # silences first
            raise
        with loop:  # closing silences the transmitter before anything else
            last = [float("-inf")]

            def _on_step(now_s: float) -> None:
                if not args.quiet and now_s - last[0] >= 1.0:
                    last[0] = now_s
                    print(tx_summary_line(loop.status(now_s)), flush=True)
            loop.run(stop, realtime=tx.realtime, max_frames=tx.max_frames, on_step=_on_step)
        if not args.quiet:
            print(tx_summary_line(loop.status(time.monotonic())), flush=True)
        return 0
    finally:
        if timer is not None:
            timer.cancel()
        for s, h in old.items():
            signal.signal(s, h)
        log.removeHandler(handler)
