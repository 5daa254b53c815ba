"""Builders of tiny mesh files as text, for the reading tests (nothing is stored on disk)."""
