"""Admin (setup) pages of shared foundations."""
