"""brimline drivers: sources of per-frame channel estimates (simulator, recorded IQ, replay, radio).

Drivers depend on ``brimline.daemon.records`` and ``brimline.daemon.errors`` only.
"""
