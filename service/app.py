"""The Flask application factory and what wraps every request.

Around each request, in order: timing, the API-key check, the view, then the generation
header, CORS (only when configured), security headers, metrics and one log line (method,
route, status, time, sizes; never a body). Every error, ours or Flask's, leaves through the
one error handler below as a JSON body with a message and no traceback.
"""

from __future__ import annotations

import hmac
import logging
import time
from pathlib import Path

from flask import Flask, g, jsonify, request
from werkzeug.exceptions import HTTPException, RequestEntityTooLarge

from nearsight.indexer.core.errors import AuthError, ForbiddenError, MisdirectedError, NearsightError, disk_full
from nearsight.indexer.storage.store import Store

from .api import api
from .config import resolve_config
from .guard import UPLOAD_ENDPOINTS, DecodeGate, RateLimiter
from .live import LiveGeneration
from .metrics import Metrics
from .params import MULTIPART_SLACK
from .review import review
from .state import ServiceState, state

log = logging.getLogger(__name__)
request_log = logging.getLogger("nearsight.service.requests")

HERE = Path(__file__).resolve().parent
GENERATION_HEADER = "X-Nearsight-Generation"
# Endpoints anyone may call: liveness and readiness probes, and the review page's own files
# (they hold no data; every call the page makes for data carries the key when one is needed).
PUBLIC_ENDPOINTS = {"api.healthz", "api.readyz", "review.page", "static"}
WRITE_ENDPOINTS = {"api.add_verdicts", "api.remove_verdicts", "api.pick_keeper", "api.drop_keeper"}


def create_app(config=None) -> Flask:
    """The application for one store. `config` overrides settings by name: store, settings, host,
    api_key, cors_origins, max_upload_bytes, max_upload_pixels, max_pixels, reload_s, watch."""
    cfg = resolve_config(config)
    Store.open(cfg.store, settings=cfg.settings).close()  # a missing store is an error now, not per request
    app = Flask(__name__, static_folder=str(HERE / "static"), static_url_path="/static")
    app.config["MAX_CONTENT_LENGTH"] = cfg.max_upload_bytes + MULTIPART_SLACK
    app.json.sort_keys = False
    metrics = Metrics()
    live = LiveGeneration(cfg.store, cfg.settings, reload_s=cfg.reload_s,
                          on_swap=lambda snap: metrics.on_snapshot(snap, swapped=live.swaps > 0),
                          on_failure=metrics.load_failures.inc)
    limiter = RateLimiter({"uploads": cfg.rate_uploads, "writes": cfg.rate_writes})
    app.extensions["nearsight"] = ServiceState(cfg, live, metrics, limiter, DecodeGate(cfg.max_decodes,
                                                                                       cfg.decode_wait_s))
    live.refresh()
    if cfg.watch:
        live.start()

    app.register_blueprint(api)
    app.register_blueprint(review)
    app.before_request(_start_timer)
    app.before_request(_check_host)
    app.before_request(_authorize)
    app.before_request(_limit)
    app.after_request(_finish)
    app.register_error_handler(Exception, _error_response)
    if not cfg.api_key:
        log.warning("no API key configured: writing endpoints (verdicts) are refused")
    return app


# -- around each request ------------------------------------------------------------------------
def _start_timer() -> None:
    g.started = time.perf_counter()
    state().metrics.in_flight.inc()
    g.counted = True


def _check_host() -> None:
    """Every route, health probes too: a request for another host is refused before anything is read."""
    host = request.headers.get("Host", "")
    if not state().config.answers_for(host):
        raise MisdirectedError(f"this server does not answer for the host {host[:80]!r}: add it to the setting "
                               "allowed_hosts if it is this machine's name")


def _authorize() -> None:
    if request.method == "OPTIONS" or request.endpoint in PUBLIC_ENDPOINTS:
        return
    cfg = state().config
    writing = request.endpoint in WRITE_ENDPOINTS
    if not (writing or cfg.reads_need_key):
        return
    if not cfg.api_key:
        raise ForbiddenError("writing is switched off: this server has no API key configured (setting api_key)")
    scheme, _, token = request.headers.get("Authorization", "").partition(" ")
    if scheme.lower() != "bearer" or not token.strip():
        what = "writing" if writing else "this server (it listens beyond loopback)"
        raise AuthError(f"{what} needs the API key: send the header 'Authorization: Bearer <key>'")
    if not hmac.compare_digest(token.strip().encode(), cfg.api_key.encode()):
        raise AuthError("the API key is not valid")


def _limit() -> None:
    """Per-client rate limits on uploads and writes (service/guard.py), after the key check so that a
    request refused for its key costs the client nothing."""
    endpoint = request.endpoint
    kind = "uploads" if endpoint in UPLOAD_ENDPOINTS else "writes" if endpoint in WRITE_ENDPOINTS else None
    if kind and request.method != "OPTIONS":
        state().limiter.take(request.remote_addr or "?", kind)


def _finish(response):
    st = state()
    snap = g.get("snapshot")
    if snap is not None:
        response.headers[GENERATION_HEADER] = snap.name
    _cors(response, st.config.cors_origins)
    response.headers.setdefault("X-Content-Type-Options", "nosniff")
    response.headers.setdefault("Referrer-Policy", "no-referrer")
    if g.pop("counted", False):
        st.metrics.in_flight.dec()
        seconds = time.perf_counter() - g.started
        route = request.url_rule.rule if request.url_rule is not None else "unmatched"
        st.metrics.observe(request.method, route, response.status_code, seconds)
        request_log.info("%s %s %s %d %.1f ms in=%s out=%s gen=%s", request.remote_addr, request.method,
                         request.path, response.status_code, seconds * 1000, request.content_length or 0,
                         response.calculate_content_length() or "-", snap.name if snap else "-")
    return response


def _cors(response, origins: tuple[str, ...]) -> None:
    origin = request.headers.get("Origin")
    if not origins or not origin:
        return
    if "*" in origins or origin.rstrip("/") in origins:
        response.headers["Access-Control-Allow-Origin"] = "*" if "*" in origins else origin
        response.headers["Access-Control-Allow-Headers"] = "Authorization, Content-Type"
        response.headers["Access-Control-Allow-Methods"] = "GET, POST, DELETE, OPTIONS"
        response.headers["Access-Control-Expose-Headers"] = GENERATION_HEADER
        response.headers["Access-Control-Max-Age"] = "600"
        response.vary.add("Origin")


# -- the one error handler ------------------------------------------------------------------------
def _error_response(exc: Exception):
    headers = {}
    exc = disk_full(exc) or exc  # a full disk under a write: 507 with what to do, not a bare 500
    if isinstance(exc, NearsightError):
        status, body = exc.http_status, exc.to_dict()
        if isinstance(exc, AuthError):
            headers["WWW-Authenticate"] = 'Bearer realm="nearsight"'
        if getattr(exc, "retry_after", None):
            headers["Retry-After"] = str(exc.retry_after)
        if status >= 500:
            log.error("%s %s failed: %s", request.method, request.path, exc.message)
    elif isinstance(exc, RequestEntityTooLarge):
        limit = state().config.max_upload_bytes
        status, body = 413, {"error": "payload_too_large",
                             "message": f"the request body is over this server's limit of {limit} bytes "
                                        "for an image (setting max_upload_bytes)"}
    elif isinstance(exc, HTTPException):
        status = exc.code or 500
        body = {"error": (exc.name or "error").lower().replace(" ", "_").replace("'", ""),
                "message": _http_message(exc)}
        allow = exc.get_response().headers.get("Allow")
        if allow:
            headers["Allow"] = allow
    else:
        log.exception("%s %s failed", request.method, request.path)
        status, body = 500, {"error": "internal_error",
                             "message": "the server failed to answer this request; the reason is in its log"}
    response = jsonify(body)
    response.status_code = status
    response.headers.update(headers)
    return response


def _http_message(exc: HTTPException) -> str:
    if exc.code == 404:
        return f"nothing at {request.path}; the API is described at /v1/openapi.json"
    if exc.code == 405:
        return f"{request.method} is not allowed on {request.path}"
    return exc.description or exc.name


__all__ = ["create_app"]
