"""streamcond: clean, timed digital events from noisy sensor streams."""

__version__ = "0.1.0"
