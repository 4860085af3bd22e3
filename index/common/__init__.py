"""What every room may use: the user-facing error, file writes and hashes, path tests, the writer lock.
Imports nothing from the rest of index."""
