"""Timeline: merging boundaries onto the recording, clock sync, pieces inside a long recording."""
