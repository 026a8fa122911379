"""The I/O-free detection core: feed points in, get breach events out.

Nothing in this package reads the clock, a socket or a file; every decision
uses the event time carried by the points.
"""
