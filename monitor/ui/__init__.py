"""The terminal UI (textual): live view, stage view, relabel view."""
