"""The JSON API router of tips, their mounting periods and conditioning events."""
