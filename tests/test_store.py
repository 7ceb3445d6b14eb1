"""The store: default location, pointers written atomically, one writer at a time."""

import os
import signal
import subprocess
import sys
import textwrap

import pytest

from nearsight.indexer.core.errors import NotFoundError, StoreLockedError
from nearsight.indexer.storage.store import Store, resolve_store_path

HOLD_LOCK = textwrap.dedent(
    """
    import sys, time
    from nearsight.indexer.storage.store import Store
    store = Store.open(sys.argv[1], create=True)
    with store.lock():
        print("locked", flush=True)
        time.sleep(60)
    """
)


def test_store_path_from_flag_then_environment_then_default(monkeypatch, tmp_path):
    monkeypatch.setenv("NEARSIGHT_STORE", str(tmp_path / "env-store"))
    assert resolve_store_path(str(tmp_path / "flag")) == tmp_path / "flag"
    assert resolve_store_path(None) == tmp_path / "env-store"
    monkeypatch.delenv("NEARSIGHT_STORE")
    assert str(resolve_store_path(None)) == "nearsight-store"


def test_opening_a_missing_store_says_how_to_make_one(tmp_path):
    with pytest.raises(NotFoundError, match="nearsight index FOLDER"):
        Store.open(tmp_path / "none")
    assert not (tmp_path / "none").exists()


def test_pointer_round_trip_leaves_no_temporary_files(tmp_path):
    store = Store.open(tmp_path / "s", create=True)
    assert store.read_pointer("generations/CURRENT") is None
    store.write_pointer("generations/CURRENT", "g-0001")
    store.write_pointer("generations/CURRENT", "g-0002")
    assert store.read_pointer("generations/CURRENT") == "g-0002"
    assert sorted(p.name for p in (tmp_path / "s" / "generations").iterdir()) == ["CURRENT"]


def _hold_lock_in_child(store_dir):
    env = dict(os.environ, PYTHONPATH=os.getcwd())
    child = subprocess.Popen([sys.executable, "-c", HOLD_LOCK, str(store_dir)], stdout=subprocess.PIPE, text=True, env=env)
    assert child.stdout.readline().strip() == "locked"
    return child


def test_second_writer_is_refused_and_a_killed_holder_releases_the_lock(tmp_path):
    store_dir = tmp_path / "s"
    child = _hold_lock_in_child(store_dir)
    try:
        store = Store.open(store_dir)
        with pytest.raises(StoreLockedError, match=f"pid {child.pid}"):
            with store.lock():
                pass
    finally:
        child.send_signal(signal.SIGKILL)
        child.wait()
    # The holder died without cleaning up: its lock file is still there, but the lock is free.
    assert (store_dir / "lock").exists()
    with store.lock():
        assert f"pid {os.getpid()}" in (store_dir / "lock").read_text()


def test_files_written_atomically_are_readable_by_other_users(tmp_path):
    """mkstemp creates 0600 files; a service running as another user must still read the store."""
    store = Store.open(tmp_path / "s", create=True)
    store.write_pointer("generations/CURRENT", "g-1")
    assert (tmp_path / "s" / "generations" / "CURRENT").stat().st_mode & 0o777 == 0o644
