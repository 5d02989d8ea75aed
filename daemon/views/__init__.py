"""What people look at: the terminal view of the status stream and text charts."""
