"""``brimline watch``: live terminal view of a running daemon's status stream."""

from __future__ import annotations

import argparse

from brimline.daemon.commands.cli import add_viewer_key_options
from brimline.daemon.errors import InputError
from brimline.daemon.views.watch import (
    DEFAULT_CLEAR_AFTER_S,
    DEFAULT_SNR_SCALE_DB,
    DEFAULT_STATUS_ENDPOINT,
    parse_snr_scale,
    watch,
)


def configure(parser: argparse.ArgumentParser) -> None:
    """Add the flags of ``brimline watch``."""
    parser.add_argument("--endpoint", default=DEFAULT_STATUS_ENDPOINT,
                        help=f"status endpoint of the daemon (default {DEFAULT_STATUS_ENDPOINT})")
    parser.add_argument("--once", action="store_true",
                        help="show the first status message and exit (1 if none within 5 s "
                             "or --duration)")
    parser.add_argument("--duration", type=float, default=None, metavar="S",
                        help="stop after S seconds")
    add_viewer_key_options(parser, "watcher")
    parser.add_argument("--tx-endpoint", default=None, metavar="ADDRESS",
                        help="also show a transmitter's status (brimline tx publishes it on "
                             "tx.status_endpoint, e.g. tcp://127.0.0.1:7345): applied map, lag, "
                             "power against its limits")
    lo, hi = DEFAULT_SNR_SCALE_DB
    parser.add_argument("--snr-scale", default=f"{lo:g}:{hi:g}", metavar="LOW:HIGH",
                        help=f"fixed SNR scale of the band picture, dB (default {lo:g}:{hi:g})")
    parser.add_argument("--clear-after", type=float, default=DEFAULT_CLEAR_AFTER_S, metavar="S",
                        help="an alarm stays at the top until it has been absent for S seconds "
                             f"of link time (default {DEFAULT_CLEAR_AFTER_S:g})")


def run(args: argparse.Namespace) -> int:
    """Watch the status stream; returns the exit code."""
    if args.duration is not None and not args.duration > 0:
        raise InputError(f"--duration={args.duration} must be a positive number of seconds")
    if "://" not in args.endpoint:
        raise InputError(f"--endpoint={args.endpoint!r} must be a ZeroMQ address such as "
                         f"{DEFAULT_STATUS_ENDPOINT}")
    if args.tx_endpoint is not None and "://" not in args.tx_endpoint:
        raise InputError(f"--tx-endpoint={args.tx_endpoint!r} must be a ZeroMQ address such "
                         f"as tcp://127.0.0.1:7345")
    if not (args.clear_after >= 0 and args.clear_after < float("inf")):
        raise InputError(f"--clear-after={args.clear_after} must be a finite number of "
                         f"seconds >= 0")
    scale = parse_snr_scale(args.snr_scale)
    if (args.daemon_key is None) != (args.own_key is None):
        raise InputError("--daemon-key and --own-key go together (CURVE needs both)")
    return watch(args.endpoint, once=args.once, duration_s=args.duration,
                 curve_server_key=args.daemon_key, curve_client_key=args.own_key,
                 tx_endpoint=args.tx_endpoint, snr_scale_db=scale,
                 clear_after_s=args.clear_after)
