"""Every state change of the pages' shared parts: the one path views, API, tasks and commands call.
"""
