"""Estimate sources behind one small interface (``base.Driver``): the simulator, a recording
replay, a SigMF IQ file and a pyadi-iio radio. Never import the runtime, sockets or commands."""
