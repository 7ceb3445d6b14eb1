"""Small file-system helpers whose point is crash safety.

A reader must never see a half-written file: we write beside the target,
fsync, rename over it (atomic on POSIX within one file system) and fsync the
directory so the rename itself survives a power cut.
"""

from __future__ import annotations

import hashlib
import os
import tempfile
from pathlib import Path

HASH_NAME = "blake2b"
FILE_MODE = 0o644
_CHUNK = 1 << 20


def human_bytes(n: int) -> str:
    """1536 -> '1.5 KiB': binary units (IEC 80000-13), the one way the CLI, the reports and the review page
    write a size."""
    value = float(n)
    for unit in ("B", "KiB", "MiB", "GiB", "TiB"):
        if abs(value) < 1024 or unit == "TiB":
            return f"{value:.0f} {unit}" if unit == "B" else f"{value:.1f} {unit}"
        value /= 1024
    return f"{n} B"


def fsync_dir(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY | os.O_DIRECTORY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def atomic_write_bytes(path: Path, data: bytes) -> None:
    """Replace `path` with `data` so that readers see the old or the new file, never a mix."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        os.fchmod(fd, FILE_MODE)  # mkstemp makes 0600; store files are read by the service too
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    fsync_dir(path.parent)


def atomic_write_text(path: Path, text: str) -> None:
    atomic_write_bytes(path, text.encode("utf-8"))


def hash_bytes(data: bytes) -> str:
    """`hash_file` of bytes in memory (an upload): the same BLAKE2b-256 hex digest."""
    return hashlib.blake2b(data, digest_size=32).hexdigest()


def hash_file(path: Path) -> str:
    """Content hash of a file (BLAKE2b, 256-bit digest, hex), read in 1 MiB chunks."""
    digest = hashlib.blake2b(digest_size=32)
    with open(path, "rb") as fh:
        while chunk := fh.read(_CHUNK):
            digest.update(chunk)
    return digest.hexdigest()
