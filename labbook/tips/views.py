"""The pages of tips, their mounting periods and conditioning events."""
