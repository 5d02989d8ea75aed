"""brimline drivers: the OFDM link model and the sources of per-frame channel estimates.

Layers: ``link`` (tone plan, frame format, transmitter, receiver DSP), ``air`` (channel
simulator), ``sources`` (sim, replay, SigMF IQ, radio). Drivers import the daemon's records,
errors, core and wire formats, never its sockets, runtime or commands.
"""
