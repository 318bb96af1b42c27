"""Helpers shared by several topics (pure functions on arrays, no hooks)."""
