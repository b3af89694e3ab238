"""The JSON API router of shared foundations."""
