"""The command line's error policy: one line on stderr, exit code 2, no traceback."""

import subprocess
import sys

from brimline.daemon.commands.cli import main


def test_unknown_flag_is_one_line(capsys):
    try:
        code = main(["--no-such-flag"])
    except SystemExit as exc:
        code = exc.code
    assert code == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "no-such-flag" in err[0]


def test_module_entry_point_runs():
    out = subprocess.run([sys.executable, "-m", "brimline.daemon", "--version"],
                         capture_output=True, text=True, timeout=60)
    assert out.returncode == 0 and "brimline" in out.stdout
