"""Radio devices behind the pyadi-iio device interface: the factory that opens one (a real
pyadi-iio object or the emulated radio) and the emulated radio itself. Used by the radio source
and the radio sink; never imports the daemon's sockets, runtime or commands."""
