"""The JSON API router of samples, recipes and preparations with their derived doses."""
