"""Tables of samples, recipes and preparations with their derived doses."""
