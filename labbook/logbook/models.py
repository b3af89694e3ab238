"""Tables of sessions, notes and the instrument's timeline."""
