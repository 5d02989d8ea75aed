"""brimline daemon: per-tone SNR tracking, bit/power loading, change control and map publishing.

The numerical core (``loading``, ``estimator``, ``change``) is pure numpy with time as an input;
sockets, files, YAML and the command line sit around it.
"""

__version__ = "0.1.0"
