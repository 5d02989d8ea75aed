"""Transmit sinks behind one small interface (``base.Sink``): a pyadi-iio radio (or the emulated
one), a SigMF IQ file and a ZeroMQ stream of raw IQ. The mirror of ``drivers/sources``; never
imports the runtime, sockets of the daemon or commands."""
