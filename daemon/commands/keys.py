"""``brimline keys DIR [--name NAME]``: create a CURVE key pair for the daemon or a client."""

from __future__ import annotations

import argparse

from brimline.daemon.net.curve import make_keypair


def configure(parser: argparse.ArgumentParser) -> None:
    """Add the flags of ``brimline keys``."""
    parser.add_argument("directory", metavar="DIR", help="folder for the key files (created)")
    parser.add_argument("--name", default="brimline",
                        help="base name of the files: NAME.key (public) and NAME.key_secret "
                             "(default: brimline)")


def run(args: argparse.Namespace) -> int:
    """Write the key pair and say where each half goes."""
    public, secret = make_keypair(args.directory, args.name)
    print(f"public key: {public}")
    print(f"secret key: {secret}  (keep private; readable by its owner only)")
    print("Daemon: set publish.curve_secret_key to its .key_secret file and give clients its "
          ".key file. Client: put its .key file in the daemon's publish.curve_clients_dir.")
    return 0
