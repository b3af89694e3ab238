"""Read-side queries of shared foundations; other apps read through these."""
