"""Every state change of sessions, notes and the instrument's timeline: the one path views, API,
tasks and commands call.
"""
