"""The pages of instruments, chambers, channels and readings."""
