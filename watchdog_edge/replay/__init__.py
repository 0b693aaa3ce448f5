"""Recordings (the JSON Lines format) and replay of them through the core."""
