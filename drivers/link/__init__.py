"""The OFDM link model: tone plan, frame format and transmitter (``frame``) and the receiver
DSP (``receiver``). Imports the records, errors and the core's QAM theory."""
