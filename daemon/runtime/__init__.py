"""The runtime: the validated config, building objects from it, the service (I/O around the
link controller: sockets, state file, recording, status, pacing) and the status message."""
