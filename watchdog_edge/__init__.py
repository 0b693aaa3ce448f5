"""watchdog-edge: watch a deployed regression model's live error against its model card."""

__version__ = "0.1.0"
