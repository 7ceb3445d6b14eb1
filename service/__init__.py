"""nearsight's HTTP layer: a thin Flask application over indexer's public functions.

`create_app(config)` builds the application (JSON API under /v1, the review page at /,
Prometheus metrics at /metrics); `service.server.run_server` runs it under waitress for
`nearsight serve`. Nothing happens at import time.
"""

from __future__ import annotations


def create_app(config=None):
    """The Flask application for one store; see `service.app.create_app`."""
    from .app import create_app as _create_app

    return _create_app(config)


__all__ = ["create_app"]
