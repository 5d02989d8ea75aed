"""brimline daemon: per-tone SNR tracking, bit/power loading, change control and map publishing.

Layers, from the ground up (each imports only the ones before it; ``tests/test_layers.py``
enforces it): ``records`` and ``errors``; ``core`` (pure numpy, time as an input); ``wire``
(codec, recording and state files); ``net`` (sockets); ``runtime`` (config, service, status);
``views``; ``commands``.
"""

__version__ = "0.1.0"
