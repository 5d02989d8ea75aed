"""The command line: ``cli`` (the ``brimline`` entry point) and one module per subcommand,
each with ``configure(parser)`` and ``run(args)``."""
