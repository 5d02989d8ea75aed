"""Wire and file formats: the message codec, recording files, the state file and SigMF IQ
captures (through the ``sigmf`` package). Imports the records, errors and the core."""
