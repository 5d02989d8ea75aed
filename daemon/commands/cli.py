"""The ``brimline`` command line: one parser, a subcommand per module, one error policy.

Every subcommand lives in a module ``brimline.daemon.commands.<name>`` that provides
``configure(parser)`` (adds its flags) and ``run(args) -> int`` (does the work). Errors that are
the user's (a :class:`~brimline.daemon.errors.BrimlineError`, a bad flag) become one line on
stderr and exit code 2; anything else is a bug and keeps its traceback.
"""

from __future__ import annotations

import argparse
import importlib
import importlib.util
import sys
from typing import NoReturn, Sequence

from brimline.daemon import __version__
from brimline.daemon.errors import BrimlineError

__all__ = ["main", "RF_CAUTION", "build_parser", "add_viewer_key_options"]

RF_CAUTION = (
    "RF caution: brimline drives a transmitter. Operate only within your licence or the band's "
    "licence-exempt rules (frequency, power, emission mask); per-tone power boosts raise the "
    "power spectral density, so keep the loaded spectrum within the mask; put enough "
    "attenuation between cabled TX and RX ports; keep clear of antennas for RF exposure. Local "
    "regulations and licensed practice take precedence over anything brimline does."
)

# name -> one-line help. Each name maps to brimline.daemon.commands.<name>.
_COMMANDS = {
    "plan": "one-shot bit/power plan from a per-tone SNR file (what-if work, no radio)",
    "run": "run the daemon: estimates in, maps and status out",
    "tx": "transmitter side: follow the daemon's maps and send frames (radio, SigMF, ZeroMQ)",
    "watch": "live terminal view of a running daemon's status stream",
    "lookout": "live view of a running daemon's status stream in a web browser (on loopback)",
    "keys": "create CURVE key pairs for encrypted map and status sockets",
    "replay": "replay a recording through the decision path offline (summary, what-if, exports)",
    "report": "pictures of a replayed recording: SNR, bits, rate and margin (PNG, PDF, HTML)",
    "sweep": "replay recordings under a grid of settings on a Dask cluster (CSV and figure)",
}


class _OneLineParser(argparse.ArgumentParser):
    """argparse that reports a bad flag in one line (no usage block) and exits with 2."""

    def error(self, message: str) -> NoReturn:
        self.exit(2, f"{self.prog}: error: {message}\n")


def add_viewer_key_options(parser: argparse.ArgumentParser, who: str) -> None:
    """Add ``--daemon-key`` and ``--own-key``, the CURVE options of a status subscriber.

    Parameters
    ----------
    parser : argparse.ArgumentParser
        The subcommand's parser.
    who : str
        What the subscriber is called in the help ("watcher", "viewer").
    """
    parser.add_argument("--daemon-key", default=None, metavar="FILE",
                        help="the daemon's public .key file: subscribe with CURVE "
                             "(needs --own-key)")
    parser.add_argument("--own-key", default=None, metavar="FILE",
                        help=f"this {who}'s .key_secret file (brimline keys); its .key must "
                             "be in the daemon's publish.curve_clients_dir when that is set")


def _command_module(name: str):
    modname = f"brimline.daemon.commands.{name}"
    if importlib.util.find_spec(modname) is None:
        return None
    return importlib.import_module(modname)


def build_parser() -> argparse.ArgumentParser:
    """Return the full ``brimline`` argument parser with every available subcommand."""
    parser = _OneLineParser(
        prog="brimline",
        description="Keeps an OFDM link's per-tone bit and power loading matched to the channel.",
        epilog=RF_CAUTION,
    )
    parser.add_argument("--version", action="version", version=f"brimline {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_OneLineParser)
    for name, help_text in _COMMANDS.items():
        module = _command_module(name)
        if module is None:
            continue
        p = sub.add_parser(name, help=help_text, description=help_text, epilog=RF_CAUTION)
        module.configure(p)
        p.set_defaults(_run=module.run)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``brimline`` command; returns the process exit code."""
    parser = build_parser()
    args = parser.parse_args(argv)
    if getattr(args, "_run", None) is None:
        parser.print_help(sys.stderr)
        return 2
    try:
        return int(args._run(args) or 0)
    except BrimlineError as exc:
        print(f"brimline {args.command}: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        return 130
