"""The pure core: QAM theory, water-filling, discrete loading, the estimator, change control
and the link controller. Functions and small state objects of numpy arrays; time comes in as an
argument. Imports only ``brimline.daemon.records`` and ``brimline.daemon.errors``: no sockets,
threads, files or clocks."""
