"""What one service instance is configured with: the store, its settings and the HTTP policy.

Values come from the store's settings (defaults < settings.toml < NEARSIGHT_* < flags),
and `create_app(config)` may override any of them by name.
"""

from __future__ import annotations

import ipaddress
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Mapping

from nearsight.indexer.core.errors import UsageError
from nearsight.indexer.core.settings import Settings, load_settings
from nearsight.indexer.storage.store import resolve_store_path

# Config names create_app takes beside "store" and "settings", and the setting each defaults to.
FROM_SETTINGS = {
    "host": "serve_host",
    "api_key": "api_key",
    "cors_origins": "cors_origins",
    "allowed_hosts": "allowed_hosts",
    "max_upload_bytes": "max_upload_bytes",
    "max_upload_pixels": "max_upload_pixels",
    "max_pixels": "max_pixels",
    "reload_s": "serve_reload_s",
    "rate_uploads": "rate_uploads",
    "rate_writes": "rate_writes",
    "max_decodes": "max_decodes",
    "decode_wait_s": "decode_wait_s",
}


def is_loopback(host: str) -> bool:
    """True for localhost and the loopback ranges (127.0.0.0/8, ::1); names other than localhost count as not."""
    host = host.strip().strip("[]").lower()
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


@dataclass(frozen=True)
class ServiceConfig:
    store: Path
    settings: Settings
    host: str
    api_key: str
    cors_origins: tuple[str, ...]
    allowed_hosts: tuple[str, ...]
    max_upload_bytes: int
    max_upload_pixels: int
    max_pixels: int
    reload_s: float
    rate_uploads: int = 120
    rate_writes: int = 120
    max_decodes: int = 2
    decode_wait_s: float = 10.0
    watch: bool = True  # run the thread that swaps in newly published generations

    def answers_for(self, host_header: str) -> bool:
        """Whether a request's Host (name or address, with or without a port) is one this server answers
        for: a loopback name, the address it listens on (unless a wildcard), or a configured name."""
        host = host_header.strip().lower()
        if host.startswith("["):  # [::1]:8080
            host = host[1:].partition("]")[0]
        elif host.count(":") == 1:  # name:port or 127.0.0.1:port (a bare IPv6 address has more colons)
            host = host.partition(":")[0]
        if not host:
            return False
        if is_loopback(host) or "*" in self.allowed_hosts:
            return True
        listening = self.host.strip("[]").lower()
        if host == listening and listening not in ("0.0.0.0", "::"):
            return True
        return host in (h.lower().strip("[]") for h in self.allowed_hosts)

    @property
    def reads_need_key(self) -> bool:
        """Beyond loopback every request (but health probes and the page's static files) needs the key."""
        return not is_loopback(self.host)


def resolve_config(config: Mapping[str, Any] | None) -> ServiceConfig:
    given = dict(config or {})
    store = resolve_store_path(given.pop("store", None)).absolute()
    settings = given.pop("settings", None) or load_settings(store_dir=store)
    values = {name: given.pop(name, settings[setting]) for name, setting in FROM_SETTINGS.items()}
    watch = bool(given.pop("watch", True))
    if given:
        raise UsageError(f"unknown service config: {', '.join(sorted(given))}")
    values["api_key"] = values["api_key"] or ""
    values["cors_origins"] = tuple(values["cors_origins"] or ())
    values["allowed_hosts"] = tuple(values["allowed_hosts"] or ())
    if values["reload_s"] <= 0:
        raise UsageError("reload_s must be > 0 seconds")
    cfg = ServiceConfig(store=store, settings=settings, watch=watch, **values)
    if cfg.reads_need_key and not cfg.api_key:
        raise UsageError(f"serving on {cfg.host}, beyond loopback, needs an API key: set api_key in "
                         f"{store / 'settings.toml'} or NEARSIGHT_API_KEY")
    return cfg
