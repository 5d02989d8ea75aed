"""Wire and file formats: the message codec, recording files and the state file.
Imports the records, errors and the core."""
