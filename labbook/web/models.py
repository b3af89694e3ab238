"""Tables of the pages' shared parts."""
