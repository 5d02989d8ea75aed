"""The OFDM link model: tone plan, frame format and transmitter (``frame``) and the receiver
DSP, one module per stage: frame sync (``sync``), channel and noise fit (``fit``), decisions and
map tables (``demod``), and the ``receiver`` that composes them into an ``RxFrame`` per block
and turns that into an ``Estimate`` record. Imports the records, errors and the core."""
