"""``sorbrank serve``: the HTTP API, plus the fitting pool in embedded mode."""
from __future__ import annotations

import argparse
import logging
import signal
import sys

HELP = "run the HTTP API (embedded fitting on all cores, or Celery workers via Redis)"
DESCRIPTION = """\
Run the sorbrank HTTP API (routes under /api/v1; /healthz and /readyz probes;
the OpenAPI document at /api/v1/openapi.json).

Two modes, chosen by the environment:
  embedded     (no SORBRANK_BROKER_URL) batches are fitted by a pool of local
               processes, one per core (SORBRANK_EMBEDDED_WORKERS to change);
               unfinished batches resume when the server starts again.
  distributed  (SORBRANK_BROKER_URL=redis://host:port/db) batches are queued
               for 'sorbrank worker' processes, which must see the same
               SORBRANK_DATA_DIR.

At start the store root must be writable and (distributed mode) the broker
must answer a PING within 3 s; otherwise the command exits with status 2 and
one message naming the variable. Logs are JSON lines on stderr
(SORBRANK_LOG_LEVEL); Prometheus metrics are at /metrics.

Environment: SORBRANK_DATA_DIR (store root: a path or a URI such as
s3://bucket/prefix, default ./data), SORBRANK_LOG_LEVEL (default INFO),
SORBRANK_CHUNK_SIZE (isotherms per job, default 2000; a sorbent's isotherms
always stay together), SORBRANK_MAX_UPLOAD_BYTES (default 67108864),
SORBRANK_MAX_JSON_BYTES (default 8388608), SORBRANK_MAX_CONCURRENT_INTAKES
(batches parsed at once, default 2; more get 503 with Retry-After),
SORBRANK_HTTP_TIMEOUT_S (an idle or stalled connection is closed after it,
default 30), SORBRANK_HTTP_THREADS (default 8),
SORBRANK_TOKENS_FILE or SORBRANK_TOKENS (bearer tokens as SHA-256 hashes with
scopes submit/read/admin). Without tokens the API is open: allowed on a
loopback address (with a loud warning), refused elsewhere unless
SORBRANK_ALLOW_OPEN=1."""
EPILOG = """\
example:
  SORBRANK_DATA_DIR=/srv/sorbrank sorbrank serve --port 8000
  curl -X POST --data-binary @run1.csv -H 'Content-Type: text/csv' \\
       'http://127.0.0.1:8000/api/v1/batches?units=pressure:kPa,loading:mmol/g'"""


def register(subparsers) -> None:
    p = subparsers.add_parser("serve", help=HELP, description=DESCRIPTION, epilog=EPILOG,
                              formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--host", default="127.0.0.1",
                   help="address to listen on (default 127.0.0.1; anything else needs tokens "
                        "or SORBRANK_ALLOW_OPEN=1)")
    p.add_argument("--port", type=int, default=8000,
                   help="TCP port (default 8000; 0 = any free port, printed at start)")
    p.set_defaults(func=run)


log = logging.getLogger("sorbrank.serve")


def _stop(signum, frame):
    raise KeyboardInterrupt


def make_server(app, host: str, port: int, settings):
    """The HTTP server: waitress, which reads each request whole (body spooled to
    a temp file past 512 KiB) before handing it to one of ``http_threads``
    threads, so slow clients hold no thread; idle or stalled connections are
    closed after ``http_timeout_s``. Bodies over the upload limit are refused by
    waitress itself, with a problem document like the app's."""
    import json

    from waitress.channel import HTTPChannel
    from waitress.server import create_server
    from waitress.task import ErrorTask

    class ProblemErrorTask(ErrorTask):
        def execute(self):
            error = self.request.error
            body = json.dumps({"type": "about:blank", "title": error.reason, "status": error.code,
                               "detail": error.body}).encode()
            self.status = f"{error.code} {error.reason}"
            self.response_headers.extend([("Content-Type", "application/problem+json"),
                                          ("X-Content-Type-Options", "nosniff")])
            self.set_close_on_finish()
            self.content_length = len(body)
            self.write(body)

    class Channel(HTTPChannel):
        error_task_class = ProblemErrorTask

    timeout_s = settings.http_timeout_s
    server = create_server(
        app, host=host, port=port, threads=settings.http_threads, ident="sorbrank",
        channel_timeout=timeout_s,
        # how often idle connections are looked for: a fraction of the timeout
        cleanup_interval=max(1, min(30, timeout_s // 2)),
        # connections cost a socket and a buffer, not a thread: allow many, and
        # poll() so that more than 1024 descriptors work
        connection_limit=1000, asyncore_use_poll=True,
        max_request_body_size=settings.max_upload_bytes,
        # the app's own log line covers every request
        expose_tracebacks=False)
    server.channel_class = Channel
    return server


def run(args) -> int:
    from sorbrank.worker import logs

    from ..app import create_app
    from ..config import ConfigError, load_settings, open_access_verdict, start_problems

    try:
        settings = load_settings()
    except ConfigError as exc:
        print(f"sorbrank serve: {exc}", file=sys.stderr)
        return 2
    allowed, warning = open_access_verdict(settings, args.host)
    if not allowed:
        print(f"sorbrank serve: {warning}", file=sys.stderr)
        return 2
    problems = start_problems(settings)
    if problems:
        print(f"sorbrank serve: {ConfigError(problems)}", file=sys.stderr)
        return 2
    logs.configure(settings.log_level)
    # every request is logged as JSON by the app; waitress's queue notes are noise
    logging.getLogger("waitress.queue").setLevel(logging.ERROR)
    if warning:
        log.warning(warning)

    executor = None
    if settings.mode == "embedded":
        from sorbrank.worker.embedded import EmbeddedExecutor

        executor = EmbeddedExecutor(settings.data_dir, settings.embedded_workers)
        app = create_app(settings, enqueue=executor.enqueue, queue_depth=executor.pending_chunks)
        resumed = executor.resume()
        detail = f"{executor.workers} fitting process(es)"
        if resumed:
            detail += f", resumed {len(resumed)} unfinished chunk(s)"
    else:
        app = create_app(settings)
        detail = f"queueing to {settings.broker_url}"
    server = make_server(app, args.host, args.port, settings)
    # SIGTERM (what process managers send) stops like Ctrl-C: accepted work is
    # on disk, unfinished chunks resume at the next start
    signal.signal(signal.SIGTERM, _stop)
    store = app.extensions["sorbrank"].store
    log.info("sorbrank: serving http://%s:%s/api/v1 (%s mode, %s; store %s)", args.host,
             server.effective_port, settings.mode, detail, store.root)
    try:
        server.run()  # returns on KeyboardInterrupt, its threads stopped
    except KeyboardInterrupt:
        pass
    finally:
        server.close()
        if executor is not None:
            executor.shutdown()
    return 0
