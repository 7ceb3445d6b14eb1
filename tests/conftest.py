"""Shared fixtures. Every test gets its own temporary folders; nothing depends on order."""

import os
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent


@pytest.fixture(autouse=True)
def _isolated_environment(monkeypatch):
    """No setting leaks in from the developer's shell."""
    for key in list(os.environ):
        if key.startswith("NEARSIGHT_"):
            monkeypatch.delenv(key)


@pytest.fixture
def run_cli(tmp_path):
    """Run the real `nearsight` command line in a subprocess; returns CompletedProcess."""
    import subprocess

    def run(*args, check_exit=None, **kwargs):
        env = dict(os.environ, PYTHONPATH=str(ROOT))
        env.update(kwargs.pop("env", {}))
        proc = subprocess.run(
            [sys.executable, "-m", "indexer", *map(str, args)],
            capture_output=True, text=True, env=env, cwd=kwargs.pop("cwd", tmp_path), timeout=600,
        )
        if check_exit is not None:
            assert proc.returncode == check_exit, proc.stderr + proc.stdout
        return proc

    return run


# The HTTP service tests share one small store and one server per session (tests/service_support.py).
from .service_support import live_server, service_store  # noqa: E402,F401
