"""The JSON API router of sessions, notes and the instrument's timeline."""
