"""The runtime: the validated config (``config``), building objects from it (``assemble``), the
service (I/O around the link controller: sockets, state file, recording, status, pacing) with its
driver-thread hand-off (``handoff``) and outlets (``outlets``), and the status message
(``status``)."""
