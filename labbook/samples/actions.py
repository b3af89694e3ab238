"""Every state change of samples, recipes and preparations with their derived doses: the one path
views, API, tasks and commands call.
"""
