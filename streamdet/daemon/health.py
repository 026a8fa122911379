"""The daemon's own health: Prometheus metrics and the /healthz and /readyz endpoints.

Metric names are built here only (``streamdet_<name>_<unit>``, ``_total`` on counters) and the
registry is passed in, so tests use a fresh ``CollectorRegistry``. Series keys never become
label values: labels are bounded (reason codes, event types, topic/partition).
"""

from __future__ import annotations

import re
import threading
from socketserver import ThreadingMixIn
from wsgiref.simple_server import WSGIRequestHandler, WSGIServer, make_server

from prometheus_client import CollectorRegistry, Counter, Gauge, Histogram, make_wsgi_app

NS = "streamdet"


_QUOTED = re.compile(r"'[^']*'|\"[^\"]*\"")
REASON_CODES = ("too_long", "bad_label", "decoder_error", "future_time", "invalid_json",
                "missing_field", "not_utf8", "bad_time", "bad_value", "malformed")


def reason_code(reason: str) -> str:
    """A bounded label value for a decode error reason (one of :data:`REASON_CODES`).

    Quoted text is the sender's, so it is ignored: a label named 'future' stays a label problem.
    """
    r = _QUOTED.sub("", reason.lower())
    if r.startswith("too long"):
        return "too_long"
    if r.startswith("label "):
        return "bad_label"
    if r.startswith("internal error"):
        return "decoder_error"
    for needle, code in (("future", "future_time"), ("invalid json", "invalid_json"),
                         ("missing", "missing_field"), ("utf-8", "not_utf8"), ("time", "bad_time"),
                         ("nan", "bad_value"), ("infinite", "bad_value"), ("numeric", "bad_value"),
                         ("number", "bad_value"), ("value", "bad_value")):
        if needle in r:
            return code
    return "malformed"


class Metrics:
    """Every metric the daemon exports, registered on ``registry``."""

    def __init__(self, registry: CollectorRegistry) -> None:
        self.registry = registry
        c = lambda name, doc, labels=(): Counter(f"{NS}_{name}", doc, labels, registry=registry)  # noqa: E731
        g = lambda name, doc, labels=(): Gauge(f"{NS}_{name}", doc, labels, registry=registry)  # noqa: E731
        self.records_in = c("records_in", "Input records (points or lines) read from Kafka")
        self.points_accepted = c("points_accepted", "Points accepted into steps")
        self.points_late = c("points_late", "Points dropped because their step had closed")
        self.points_dropped = c("points_dropped", "Points dropped for other reasons", ["reason"])
        self.records_bad = c("records_bad", "Records that could not be decoded", ["reason"])
        self.dead_letters = c("dead_letters", "Messages sent to the dead-letter topic")
        self.dead_letters_truncated = c("dead_letters_truncated",
                                        "Dead letters too large to send whole, sent as truncated copies")
        self.undeliverable = c("undeliverable", "Messages that can never be delivered (too large or "
                               "refused), logged and skipped, by kind (event or dead_letter)", ["kind"])
        self.events_out = c("events_out", "Breach events delivered", ["type"])
        self.delivery_failures = c("delivery_failures", "Event deliveries that failed (retried)")
        self.checkpoints = c("checkpoints", "Checkpoints written")
        self.restored_series = c("restored_series", "Series in restored checkpoints, by what the restore "
                                 "did with them (kept, dropped: rule gone, relearning: step or kind "
                                 "changed)", ["outcome"])
        self.checkpoint_pause = Histogram(
            f"{NS}_checkpoint_pause_seconds",
            "Time the consume loop spends taking a checkpoint's copy (the rest happens in the background)",
            registry=registry, buckets=(0.001, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1, 2.5, 5))
        self.series_active = g("series_active", "Series with state")
        self.series_learning = g("series_learning", "Series still in their learning period")
        self.breaches_open = g("breaches_open", "Breaches currently open")
        # peer groups (rules with peers)
        self.peer_groups_judged = c("peer_groups_judged", "Group steps judged (enough members with data)")
        self.peer_members_judged = c("peer_members_judged", "Member steps judged against their group")
        self.outliers_open = g("outliers_open", "Peer outliers currently open")
        self.peer_groups_split = g("peer_groups_split",
                                   "Peer groups with members in more than one input partition (judged "
                                   "per partition: key the input by the group labels)")
        self.state_bytes = g("state_bytes", "Bytes of engine state arrays")
        # mutes (silences and maintenance windows)
        self.mutes_active = g("mutes_active", "Mutes in force at the partitions' data time (the most "
                              "of any partition)")
        self.steps_muted = c("steps_muted", "Closed steps that fell in a mute (no breach opens)")
        self.lag = g("consumer_lag_messages", "Messages between the consumer and the end of the partition",
                     ["topic", "partition"])
        self.since_checkpoint = g("seconds_since_checkpoint", "Seconds since the last durable checkpoint")
        self.ready = g("ready", "1 when connected, assigned and restored")
        self.batch_seconds = Histogram(f"{NS}_batch_processing_seconds", "Time to process one batch",
                                       registry=registry,
                                       buckets=(0.001, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1, 2.5))
        # Alertmanager sink (streamdet.alerting.alertmanager)
        self.alertmanager_alerts_sent = c("alertmanager_alerts_sent", "Alerts Alertmanager accepted, "
                                          "re-sends included, by state (firing or resolved)", ["state"])
        self.alertmanager_post_failures = c("alertmanager_post_failures", "Posts to Alertmanager that "
                                            "failed, by reason (connection, timeout, server_error, "
                                            "http_error, refused)", ["reason"])
        self.alertmanager_rejected = c("alertmanager_rejected", "Alerts Alertmanager refused (HTTP 400), "
                                       "dropped")
        self.alertmanager_dropped = c("alertmanager_dropped", "Events or resolutions dropped before "
                                      "posting, by reason (queue_full, pending_full)", ["reason"])
        self.alertmanager_firing = g("alertmanager_firing", "Firing alerts being re-sent to Alertmanager")
        self.delivery_delay = Histogram(
            f"{NS}_step_close_to_delivery_seconds",
            "Wall time from the step close that decided an event to its delivery acknowledgement",
            registry=registry, buckets=(0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 0.75, 1, 2.5, 5, 10))


class _QuietHandler(WSGIRequestHandler):
    def log_message(self, format: str, *args) -> None:
        pass


class _ThreadingServer(ThreadingMixIn, WSGIServer):
    daemon_threads = True
    allow_reuse_address = True


class HealthServer:
    """Serves /metrics, /healthz (alive) and /readyz (``ready()`` true) on one port."""

    def __init__(self, metrics: Metrics, ready, host: str, port: int, routes=None) -> None:
        metrics_app = make_wsgi_app(metrics.registry)
        routes = dict(routes or {})  # extra WSGI apps by path (shadow mode: the alert webhook)
        # a path ending in "/" serves everything under it (series bands: /series/{key}/band.svg)
        prefixes = [(p, a) for p, a in routes.items() if p.endswith("/")]

        def app(environ, start_response):
            path = environ.get("PATH_INFO", "")
            if path in routes:
                return routes[path](environ, start_response)
            for prefix, sub in prefixes:
                if path.startswith(prefix):
                    return sub(environ, start_response)
            if path == "/healthz":
                start_response("200 OK", [("Content-Type", "text/plain")])
                return [b"ok\n"]
            if path == "/readyz":
                ok, why = ready()
                start_response("200 OK" if ok else "503 Service Unavailable",
                               [("Content-Type", "text/plain")])
                return [(why + "\n").encode()]
            return metrics_app(environ, start_response)

        self.server = make_server(host, port, app, server_class=_ThreadingServer,
                                  handler_class=_QuietHandler)
        self.port = self.server.server_port
        self.thread = threading.Thread(target=self.server.serve_forever, name="health", daemon=True)

    def start(self) -> HealthServer:
        self.thread.start()
        return self

    def stop(self) -> None:
        self.server.shutdown()
        self.server.server_close()
