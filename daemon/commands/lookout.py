"""``brimline lookout``: the operators' live view of a daemon's status stream, in a browser."""

from __future__ import annotations

import argparse
import ipaddress
import math
import sys

from brimline.daemon.commands.cli import add_viewer_key_options
from brimline.daemon.errors import InputError
from brimline.daemon.views.lookout import DEFAULT_HOST, DEFAULT_PORT, DEFAULT_SNR_RANGE_DB, Lookout
from brimline.daemon.views.watch import DEFAULT_STATUS_ENDPOINT, parse_snr_scale

__all__ = ["configure", "run"]


def configure(parser: argparse.ArgumentParser) -> None:
    """Add the flags of ``brimline lookout``."""
    parser.add_argument("--endpoint", default=DEFAULT_STATUS_ENDPOINT,
                        help=f"status endpoint of the daemon (default {DEFAULT_STATUS_ENDPOINT})")
    parser.add_argument("--host", default=DEFAULT_HOST,
                        help=f"address the page is served on (default {DEFAULT_HOST}: this "
                             "machine only; the page has no login)")
    parser.add_argument("--port", type=int, default=DEFAULT_PORT,
                        help=f"TCP port of the page (default {DEFAULT_PORT}; 0 picks a free one)")
    lo, hi = DEFAULT_SNR_RANGE_DB
    parser.add_argument("--snr-scale", default=f"{lo:g}:{hi:g}", metavar="LOW:HIGH",
                        help=f"fixed SNR scale of the band chart and waterfall, dB "
                             f"(default {lo:g}:{hi:g})")
    parser.add_argument("--duration", type=float, default=None, metavar="S",
                        help="stop after S seconds")
    add_viewer_key_options(parser, "viewer")


def _is_loopback(host: str) -> bool:
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


def run(args: argparse.Namespace) -> int:
    """Serve the live page until Ctrl-C or ``--duration``; returns the exit code."""
    if args.duration is not None and not (math.isfinite(args.duration) and args.duration > 0):
        raise InputError(f"--duration={args.duration} must be a positive number of seconds")
    if "://" not in args.endpoint:
        raise InputError(f"--endpoint={args.endpoint!r} must be a ZeroMQ address such as "
                         f"{DEFAULT_STATUS_ENDPOINT}")
    if not 0 <= args.port <= 65535:
        raise InputError(f"--port={args.port} must be 0..65535")
    if not args.host or any(c.isspace() for c in args.host):
        raise InputError(f"--host={args.host!r} must be a host name or address")
    if (args.daemon_key is None) != (args.own_key is None):
        raise InputError("--daemon-key and --own-key go together (CURVE needs both)")
    scale = parse_snr_scale(args.snr_scale)
    if not _is_loopback(args.host):
        print(f"brimline lookout: warning: serving on {args.host}: the page has no login, "
              "anyone who reaches that address sees the link's status", file=sys.stderr)
    try:
        with Lookout(args.endpoint, host=args.host, port=args.port, snr_range_db=scale,
                     curve_server_key=args.daemon_key, curve_client_key=args.own_key) as view:
            print(f"brimline lookout: open {view.url} (status from {args.endpoint}; "
                  "Ctrl-C stops)", flush=True)
            view.wait(args.duration)
    except KeyboardInterrupt:
        pass
    return 0
