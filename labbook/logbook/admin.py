"""Admin (setup) pages of sessions, notes and the instrument's timeline."""
