"""Shared leaves: errors, array helpers, colours, wording, progress."""
