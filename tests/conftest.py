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
            [sys.executable, "-m", "nearsight", *map(str, args)],
            capture_output=True, text=True, env=env, cwd=kwargs.pop("cwd", tmp_path), timeout=600,
        )
        if check_exit is not None:
            assert proc.returncode == check_exit, proc.stderr + proc.stdout
        return proc

    return run


# The HTTP service tests share one small store and one server per session (tests/service_support.py).
from .service_support import live_server, service_store  # noqa: E402,F401


def pytest_collection_modifyitems(items):
    """Give every item a node id of its own.

    schemathesis 4.32 names each test it generates after its API operation (`item.name`, e.g.
    "test_...[GET /healthz]"), but under pytest 9 it cannot add the operation to the node id
    (it writes `_nodeid`, which pytest 9 replaced by a structured id), so all of one test's
    items share one id. pytest-xdist's per-module scheduling (`make test`) keys items by id and
    would then run one operation of each test; `-k` could not pick an operation either. The
    missing part is taken from the item's name, through pytest's own NodeId.with_params."""
    for item in items:
        base = getattr(item, "originalname", item.name)
        params = item.name[len(base) + 1 : -1] if item.name.startswith(base + "[") else None
        node_id = getattr(item, "_id", None)
        if params and node_id is not None and getattr(node_id, "params", "") is None:
            item._id = node_id.with_params(params)
    ids = [item.nodeid for item in items]
    assert len(set(ids)) == len(ids), "two collected tests share a node id; pytest-xdist would run one of them"
