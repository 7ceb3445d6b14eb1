"""What a request's view reads: the service's state for the app, and the generation it answers from.

Its own module so that the views (service/api.py) and the application factory (service/app.py) both
import it and neither imports the other.
"""

from __future__ import annotations

import threading
import time
from dataclasses import dataclass, field

from flask import g

from nearsight.indexer.core.errors import NotReadyError
from nearsight.indexer.storage.store import Store

from .config import ServiceConfig
from .guard import DecodeGate, RateLimiter
from .live import LiveGeneration, Snapshot
from .metrics import Metrics


@dataclass
class ServiceState:
    """Everything the views need, kept in app.extensions["nearsight"]."""

    config: ServiceConfig
    live: LiveGeneration
    metrics: Metrics
    limiter: RateLimiter
    decodes: DecodeGate
    started_at: float = field(default_factory=time.time)
    _local: threading.local = field(default_factory=threading.local)

    def store(self) -> Store:
        """This thread's Store, with its own SQLite connection (connections are per thread)."""
        store = getattr(self._local, "store", None)
        if store is None:
            store = self._local.store = Store.open(self.config.store, settings=self.config.settings)
        return store


def state() -> ServiceState:
    from flask import current_app

    return current_app.extensions["nearsight"]


def snapshot(required: bool = True) -> Snapshot | None:
    """The generation this request answers from, taken once per request."""
    if "snapshot" not in g:
        g.snapshot = state().live.current()
    if g.snapshot is None and required:
        raise NotReadyError("no generation is being served yet: run `nearsight index FOLDER` on the store; "
                            "this service picks the new generation up by itself")
    return g.snapshot
