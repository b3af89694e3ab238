"""Read-side queries of people, groups and API tokens; other apps read through these."""
