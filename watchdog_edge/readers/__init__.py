"""Readers: processes that only read what agents publish (retained status and state), never the core.

``fleet`` gathers the retained messages of one or many agents from a broker, or from an
agent's own state file when the broker is away; ``status`` turns them into the table of
``watchdog-edge status``; ``metrics`` serves them as OpenMetrics text. ``commands`` holds the
one write an operator makes, a planned-work command, confirmed by reading the agent's status.
``page`` is the local page (read-only): ``history`` keeps what it reads in SQLite, ``render``
draws it as HTML with inline SVG.
"""
