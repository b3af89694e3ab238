"""Admin (setup) pages of instruments, chambers, channels and readings."""
