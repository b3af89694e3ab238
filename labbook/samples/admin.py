"""Admin (setup) pages of samples, recipes and preparations with their derived doses."""
