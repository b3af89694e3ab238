"""Admin (setup) pages of the pages' shared parts."""
