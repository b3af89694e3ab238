"""The pages of people, groups and API tokens."""
