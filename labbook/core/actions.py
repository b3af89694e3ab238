"""Every state change of shared foundations: the one path views, API, tasks and commands call."""
