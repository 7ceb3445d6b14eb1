"""What the HTTP service tests share: one small real store, real server processes, a tiny HTTP client.

The store is built once per test session from scikit-image's bundled photos (open data, no
download): 16 photos at 320 px, a 3 x 3 grid of tiles cut from each (distractors that share
a photo's texture), and for three photos a PNG with the same pixels plus a 75% JPEG copy,
so the duplicate groups hold pairs of different contents that a person can judge.

Servers are `python -m nearsight serve --port 0` subprocesses bound to 127.0.0.1; the test
reads the address the server prints. Each consumer that writes (verdicts, a new
generation) gets its own copy of the store.
"""

from __future__ import annotations

import http.client
import json
import os
import shutil
import signal
import subprocess
import sys
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path

import pytest
from PIL import Image

ROOT = Path(__file__).resolve().parent.parent
API_KEY = "test-key-0123456789abcdef"
# Photos that have no planted copy: a transformed version of one must find the photo itself first.
COPIED = ("astronaut", "coffee", "chelsea")


def resized_copy_group(groups: list[dict]) -> tuple[dict, str]:
    """(the first group that holds a photo of COPIED with its 75 % resize, that photo's name). Which of the three
    photos it is depends on the machine: the 20-step tiny encoder's neighbours decide which pairs are verified, and
    on one machine the astronaut's resize joined another photo's group while the coffee's stayed with it."""
    for name in COPIED:
        for group in groups:
            names = {Path(m["path"]).name for m in group["members"]}
            if {f"{name}.jpg", f"{name}-smaller.jpg"} <= names:
                return group, name
    raise AssertionError(f"no group holds a photo and its resize among {len(groups)} groups")


def _train_config():
    from nearsight.indexer.learning.train import TrainConfig

    # A tiny encoder trained for 20 steps (a few seconds on 2 cores). Measured while writing these
    # tests: 3 steps already rank a 70%-resized JPEG (quality 60) of each of the 13 uncopied photos
    # first, and so did 150 steps; the mild edit is what makes this dependable, not the training.
    # Heavier edits need the minutes of training that tests/test_quality.py spends (marked slow).
    return TrainConfig(arch="tiny", dim=32, size=64, embed_size=None, batch_size=16, steps=20, minutes=None, heldout=8,
                       workers=0, checkpoint_every_s=3600, seed=0)


def make_archive(folder: Path) -> dict[str, Path]:
    """The photo archive; returns photo name -> path of the original."""
    from .test_train import skimage_photos

    folder.mkdir(parents=True)
    originals = {}
    for name, im in skimage_photos():
        im.thumbnail((320, 320))
        path = folder / f"{name}.jpg"
        im.save(path, quality=92)
        originals[name] = path
        w, h = im.size
        for i in range(3):
            for j in range(3):
                im.crop((i * w // 3, j * h // 3, (i + 1) * w // 3, (j + 1) * h // 3)).save(
                    folder / f"{name}_t{i}{j}.jpg", quality=90)
    for name in COPIED:
        im = Image.open(originals[name])
        im.save(folder / f"{name}-same-pixels.png")
        im.resize((im.width * 3 // 4, im.height * 3 // 4), Image.Resampling.LANCZOS).save(
            folder / f"{name}-smaller.jpg", quality=80)
    return originals


def transformed(src: Path, dest: Path) -> Path:
    """A mild edit of a photo: 70% of its size, re-saved as JPEG at quality 60 (Pillow)."""
    im = Image.open(src)
    im.resize((im.width * 7 // 10, im.height * 7 // 10), Image.Resampling.LANCZOS).save(dest, quality=60)
    return dest


@dataclass
class BuiltStore:
    template: Path          # the pristine store; copy it, never serve it
    archive: Path
    originals: dict[str, Path]
    work: Path
    copies: int = 0

    def copy(self, name: str) -> Path:
        self.copies += 1
        dest = self.work / f"{name}-{self.copies}"
        shutil.copytree(self.template, dest)
        return dest

    def copy_with_archive(self, name: str) -> Path:
        """A copy of the store whose catalog points at its own copy of the archive (beside it, files'
        sizes and modification times kept): for a test that moves files, such as a quarantine with
        apply, so that the shared archive stays whole whatever order the tests run in."""
        import sqlite3

        dest = self.copy(name)
        archive = dest.parent / f"{dest.name}-archive"
        shutil.copytree(self.archive, archive)  # copy2: sizes and mtimes kept, so the scan sees no change
        with sqlite3.connect(dest / "catalog.sqlite") as conn:
            moved = conn.execute("UPDATE sources SET root = ? WHERE root = ?",
                                 (str(archive.resolve()), str(self.archive.resolve()))).rowcount
        conn.close()
        assert moved == 1, f"the template's catalog does not name {self.archive}"
        return dest


def build_store(work: Path) -> BuiltStore:
    from nearsight.indexer.building.pipeline import run_index
    from nearsight.indexer.core.settings import load_settings
    from nearsight.indexer.storage.store import Store

    archive = work / "archive"
    originals = make_archive(archive)
    template = work / "template-store"
    settings = load_settings(environ={}, overrides={"workers": 1})
    with Store.open(template, create=True, settings=settings) as store:
        # No calibration here: it is the lead's module and costs more than the rest of the build;
        # the calibrated paths are checked against Generation.threshold on whatever is published.
        run_index(store, [archive], progress=False, train_config=_train_config(), calibrate=False)
    return BuiltStore(template, archive, originals, work)


def sha256(path: Path) -> str:
    """SHA-256 of a file's bytes (hashlib), the tests' outside check that files are what they were."""
    import hashlib

    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


def open_plain_store(path: Path):
    """A store opened with its defaults only (no NEARSIGHT_* from the environment)."""
    from nearsight.indexer.core.settings import load_settings
    from nearsight.indexer.storage.store import Store

    return Store.open(path, settings=load_settings(environ={}))


# -- a real server process --------------------------------------------------------------------------
@dataclass
class ServerProcess:
    store: Path
    env: dict = field(default_factory=dict)
    log_path: Path | None = None
    proc: subprocess.Popen | None = None
    base: str = ""
    host: str = "127.0.0.1"
    port: int = 0

    def start(self, timeout: float = 60.0) -> "ServerProcess":
        env = {k: v for k, v in os.environ.items() if not k.startswith("NEARSIGHT_")}
        # No per-client rate limits unless a test sets them (tests/test_service_guard.py): every test client
        # is 127.0.0.1, and the load and property-based tests send hundreds of uploads a minute.
        env.update({"PYTHONPATH": str(ROOT), "NEARSIGHT_API_KEY": API_KEY, "NEARSIGHT_SERVE_RELOAD_S": "0.2",
                    "NEARSIGHT_WORKERS": "1", "NEARSIGHT_RATE_UPLOADS": "0", "NEARSIGHT_RATE_WRITES": "0"})
        env.update(self.env)
        self.log_path = self.log_path or self.store.parent / f"{self.store.name}-server.log"
        log = open(self.log_path, "wb")
        self.proc = subprocess.Popen(
            [sys.executable, "-m", "nearsight", "serve", "--store", str(self.store), "--host", "127.0.0.1",
             "--port", "0", "--threads", "8"],
            stdout=subprocess.PIPE, stderr=log, env=env, cwd=str(self.store.parent), text=True)
        log.close()
        deadline = time.monotonic() + timeout
        lines = []
        while time.monotonic() < deadline:
            line = self.proc.stdout.readline()
            if not line:
                break
            lines.append(line)
            if "listening on http://" in line:
                self.base = line.split("listening on ", 1)[1].split()[0].rstrip("/")
                self.host, port = self.base.removeprefix("http://").rsplit(":", 1)
                self.port = int(port)
                threading.Thread(target=self.proc.stdout.read, daemon=True).start()  # drain the rest
                return self
        self.stop()
        raise RuntimeError(f"server did not start: {''.join(lines)}\n{self.log()}")

    def log(self) -> str:
        return self.log_path.read_text(errors="replace") if self.log_path and self.log_path.exists() else ""

    def stop(self) -> None:
        if self.proc and self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
            try:
                self.proc.wait(timeout=15)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait()

    def client(self, key: str | None = None) -> "Client":
        return Client(self.host, self.port, key)


@dataclass
class Response:
    status: int
    headers: dict
    body: bytes

    def json(self):
        return json.loads(self.body)


class Client:
    """A minimal HTTP/1.1 client on one keep-alive connection (http.client from the standard library)."""

    def __init__(self, host: str, port: int, key: str | None = None, timeout: float = 60.0):
        self.host, self.port, self.key, self.timeout = host, port, key, timeout
        self.conn: http.client.HTTPConnection | None = None

    def request(self, method: str, path: str, body: bytes | None = None, headers: dict | None = None) -> Response:
        headers = dict(headers or {})
        if self.key and "Authorization" not in headers:
            headers["Authorization"] = f"Bearer {self.key}"
        for attempt in (1, 2):
            if self.conn is None:
                self.conn = http.client.HTTPConnection(self.host, self.port, timeout=self.timeout)
            try:
                self.conn.request(method, path, body=body, headers=headers)
                raw = self.conn.getresponse()
                data = raw.read()
                out = Response(raw.status, {k.lower(): v for k, v in raw.getheaders()}, data)
                if raw.getheader("Connection", "").lower() == "close":
                    self.close()
                return out
            except (http.client.RemoteDisconnected, BrokenPipeError, ConnectionResetError):
                # The server closed an idle keep-alive connection; one fresh try (a request is never sent twice
                # after the server has seen it: these errors mean it did not answer at all).
                self.close()
                if attempt == 2:
                    raise
        raise AssertionError("unreachable")

    def get(self, path: str, **kw) -> Response:
        return self.request("GET", path, **kw)

    def post_json(self, path: str, obj) -> Response:
        return self.request("POST", path, json.dumps(obj).encode(), {"Content-Type": "application/json"})

    def post_image(self, path: str, data: bytes, content_type: str = "image/jpeg") -> Response:
        return self.request("POST", path, data, {"Content-Type": content_type})

    def close(self) -> None:
        if self.conn is not None:
            self.conn.close()
            self.conn = None


def multipart(field_name: str, filename: str, data: bytes, content_type: str = "image/jpeg",
              fields: dict | None = None) -> tuple[bytes, str]:
    """A multipart/form-data body (RFC 7578) and its Content-Type header."""
    return multipart_files([(field_name, filename, data, content_type)], fields)


def multipart_files(files: list[tuple[str, str, bytes, str]], fields: dict | None = None) -> tuple[bytes, str]:
    """A multipart/form-data body (RFC 7578) with several files, each (field name, file name, bytes, type)."""
    boundary = "nearsight-test-boundary-7f3a"
    parts = []
    for name, value in (fields or {}).items():
        parts.append(f'--{boundary}\r\nContent-Disposition: form-data; name="{name}"\r\n\r\n{value}\r\n'.encode())
    for field_name, filename, data, content_type in files:
        parts.append(f'--{boundary}\r\nContent-Disposition: form-data; name="{field_name}"; filename="{filename}"\r\n'
                     f"Content-Type: {content_type}\r\n\r\n".encode() + data + b"\r\n")
    parts.append(f"--{boundary}--\r\n".encode())
    return b"".join(parts), f"multipart/form-data; boundary={boundary}"


# -- fixtures (imported into tests/conftest.py so that one store serves the whole session) --------------
@pytest.fixture(scope="session")
def service_store(tmp_path_factory) -> BuiltStore:
    return build_store(tmp_path_factory.mktemp("service"))


@pytest.fixture(scope="session")
def live_server(service_store):
    """One server for the read-mostly API and browser tests, on its own copy of the store."""
    server = ServerProcess(service_store.copy("live"),
                           env={"NEARSIGHT_MAX_UPLOAD_BYTES": str(2 * 1024 * 1024),
                                "NEARSIGHT_MAX_UPLOAD_PIXELS": "20000000"}).start()
    yield server
    server.stop()


def artifacts_dir() -> Path:
    """test-artifacts/ at the repository root (git-ignored): screenshots and load-test figures."""
    path = ROOT / "test-artifacts"
    path.mkdir(exist_ok=True)
    return path


# -- clients querying while a generation is swapped -----------------------------------------------
class QueryLoad:
    """`clients` threads sending `request(client, i)` to a server until the block ends; every
    answer is kept as (started, finished, status or None, generation header or the error)."""

    def __init__(self, server: "ServerProcess", clients: int, request):
        self.server, self.request = server, request
        self.answers: list[tuple] = []
        self._lock = threading.Lock()
        self._stop = threading.Event()
        self._threads = [threading.Thread(target=self._run, args=(n,)) for n in range(clients)]

    def _run(self, n: int) -> None:
        c = self.server.client()
        i = n
        while not self._stop.is_set():
            i += 1
            started = time.monotonic()
            try:
                r = self.request(c, i)
                outcome = (r.status, r.headers.get("x-nearsight-generation"))
            except Exception as exc:  # a failed request is what these tests look for
                outcome = (None, repr(exc))
            with self._lock:
                self.answers.append((started, time.monotonic(), *outcome))
        c.close()

    def __enter__(self) -> "QueryLoad":
        for t in self._threads:
            t.start()
        return self

    def __exit__(self, *exc) -> None:
        self._stop.set()
        for t in self._threads:
            t.join(timeout=60)

    def wait_for(self, generation: str, settle_s: float, timeout: float = 60) -> None:
        """Until `generation` has been answering for `settle_s` seconds (or the timeout)."""
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            with self._lock:
                seen = [a for a in self.answers if a[3] == generation]
            if seen and time.monotonic() - min(a[1] for a in seen) > settle_s:
                return
            time.sleep(0.1)

    def assert_swapped(self, old: str, new: str) -> None:
        """No request failed, both generations answered, and none after the first new answer was old."""
        failed = [a for a in self.answers if a[2] != 200]
        assert not failed, failed[:5]
        assert {a[3] for a in self.answers} == {old, new}
        first_new = min(a[1] for a in self.answers if a[3] == new)
        stale = [a for a in self.answers if a[0] > first_new and a[3] != new]
        assert not stale, stale[:5]
