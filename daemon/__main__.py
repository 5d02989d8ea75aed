"""``python -m brimline.daemon`` is the same as the ``brimline`` command."""

from brimline.daemon.commands.cli import main

raise SystemExit(main())
