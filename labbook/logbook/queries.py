"""Read-side queries of sessions, notes and the instrument's timeline; other apps read through
these.
"""
