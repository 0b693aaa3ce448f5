"""Readers: processes that read what agents publish on the broker (the page, the status command, metrics)."""
