"""Read-side queries of samples, recipes and preparations with their derived doses; other apps read
through these.
"""
