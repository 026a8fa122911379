"""Shadow mode: streamdet beside the alerts a team already has.

``compare`` matches existing alert intervals against streamdet's breaches (pure), ``alerts_in``
reads Alertmanager webhook payloads, ``state`` keeps both sides for the daemon and its
checkpoint, ``report`` prints tables and writes the HTML timeline.
"""
