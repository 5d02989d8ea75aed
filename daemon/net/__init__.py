"""Sockets: the map publisher (maps, heartbeats, snapshots, acknowledgements), the status
publisher, the follower and CURVE keys. Imports the records, errors, core and wire formats."""
