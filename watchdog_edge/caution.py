"""The advisory caution, in one place, for every screen and log where a user starts or reads the tool."""

CAUTION = (
    "watchdog-edge is an advisory monitor of a model's error: it is not a protection or safety system "
    "and not a substitute for alarms, interlocks or trips. Site rules and qualified people decide what "
    "is done about the equipment."
)
