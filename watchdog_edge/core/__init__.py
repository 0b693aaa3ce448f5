"""The sans-I/O core: records and ticks in, events out. No clock, socket, thread or disk."""
