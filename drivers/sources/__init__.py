"""Estimate sources behind one small interface (``base.Driver``): the simulator, a recording
replay, a SigMF IQ file, a pyadi-iio radio (supervised: reopened after faults), estimates pushed
over ZeroMQ by the user's own receiver (``pushed``) and raw IQ over ZeroMQ (``iqstream``).
Never import the runtime, sockets of the daemon or commands."""
