"""`nearsight serve`: the application under waitress, a production WSGI server (never Flask's own).

One process, `serve_threads` request threads; the index and model are loaded once and
shared. Errors waitress answers itself (a body over the size limit, a malformed request
line) are JSON like the application's. SIGTERM and Ctrl-C stop it.
"""

from __future__ import annotations

import json
import logging
import secrets
import signal
import sys
from pathlib import Path

from waitress.channel import HTTPChannel
from waitress.server import create_server
from waitress.task import ErrorTask

from nearsight.indexer.core.errors import UsageError
from nearsight.indexer.core.settings import Settings

from .app import create_app
from .config import is_loopback

log = logging.getLogger(__name__)


class _JsonErrorTask(ErrorTask):
    """waitress's own error answers (400, 413, 431, ...) as the API's JSON error body."""

    def execute(self):
        error = self.request.error
        body = json.dumps({"error": error.reason.lower().replace(" ", "_"),
                           "message": f"{error.reason}: {error.body}"}).encode()
        self.status = f"{error.code} {error.reason}"
        self.response_headers.append(("Content-Type", "application/json"))
        self.set_close_on_finish()
        self.content_length = len(body)
        self.write(body)


class _JsonErrorChannel(HTTPChannel):
    error_task_class = _JsonErrorTask


def _urls(server) -> list[str]:
    listening = getattr(server, "effective_listen", None) or [(server.effective_host, server.effective_port)]
    out = []
    for host, port in listening:
        host = f"[{host}]" if ":" in str(host) else host
        out.append(f"http://{host}:{port}/")
    return out


def run_server(store: Path, settings: Settings, *, out=None) -> int:
    """Serve until SIGTERM or Ctrl-C; prints where it listens (and the page's address) on `out`."""
    out = out or sys.stdout
    host, port, threads = settings.serve_host, settings.serve_port, settings.serve_threads
    if threads < 1:
        raise UsageError("serve_threads must be at least 1")
    api_key, one_off = settings.api_key, False
    if not api_key:
        if not is_loopback(host):
            raise UsageError(f"serving on {host}, beyond loopback, needs an API key: set NEARSIGHT_API_KEY "
                             f"or api_key in {Path(store) / 'settings.toml'}")
        api_key, one_off = secrets.token_urlsafe(24), True
    app = create_app({"store": store, "settings": settings, "host": host, "api_key": api_key})
    live = app.extensions["nearsight"].live
    try:
        server = create_server(app, host=host, port=port, threads=threads, ident="nearsight",
                               max_request_body_size=app.config["MAX_CONTENT_LENGTH"],
                               clear_untrusted_proxy_headers=True, expose_tracebacks=False,
                               channel_timeout=max(1, round(settings.client_timeout_s)))
    except OSError as exc:
        live.stop()
        raise UsageError(f"cannot listen on {host}:{port}: {exc.strerror or exc}") from None
    for dispatcher in list(getattr(server, "map", {}).values()) + [server]:
        if hasattr(dispatcher, "channel_class"):
            dispatcher.channel_class = _JsonErrorChannel
    urls = _urls(server)
    for url in urls:
        print(f"nearsight serve: listening on {url} ({threads} threads)", file=out, flush=True)
    if one_off:
        print(f"nearsight serve: review page {urls[0]}#key={api_key}  (a one-off API key for this run; "
              "set api_key to keep one)", file=out, flush=True)
    else:
        print(f"nearsight serve: review page {urls[0]}", file=out, flush=True)

    def stop(signum, frame):
        raise KeyboardInterrupt

    previous = signal.signal(signal.SIGTERM, stop)
    try:
        server.run()
    except KeyboardInterrupt:
        log.info("stopping")
    finally:
        signal.signal(signal.SIGTERM, previous)
        server.close()
        live.stop()
    return 0
