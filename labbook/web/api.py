"""The JSON API router of the pages' shared parts."""
