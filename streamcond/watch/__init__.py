"""``streamcond watch``: a live view of a station for commissioning.

Per channel: the value, the band, the level, σ̂ and the margin in σ̂, the edges of the last
minute, the age of the value shown, the chatter flag, and a small trace of recent values
against the band; for the station: the source rate, bad lines, the spool depth and the broker
state. It reads what the daemon publishes over MQTT (edge, state and stats topics and the
retained ``<prefix>/health`` record), or, with ``--port`` when no daemon is running, reads the
port and runs the same pipeline itself.

On a terminal the view is a ``rich`` table refreshed in place; otherwise (a pipe, a log file)
plain text blocks are printed at a steady pace.

Layout: :mod:`.model` (pure: records and health in, rows out), :mod:`.render` (the rich and the
plain views), :mod:`.feeds` (MQTT, or the port and the pipeline), :mod:`.command`.
"""

from .command import main

__all__ = ["main"]
