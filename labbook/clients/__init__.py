"""Programs that run outside the server and talk to its API (the logger client)."""
