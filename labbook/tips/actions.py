"""Every state change of tips, their mounting periods and conditioning events: the one path views,
API, tasks and commands call.
"""
