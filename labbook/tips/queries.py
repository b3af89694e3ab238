"""Read-side queries of tips, their mounting periods and conditioning events; other apps read
through these.
"""
