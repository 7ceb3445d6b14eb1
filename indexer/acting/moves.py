"""Moving one file without ever losing it, checked by content hash.

The new name is made first and its bytes are checked against the expected hash
before the old name goes, so at every instant at least one complete, verified
copy exists. On one file system the new name is a hard link to the same inode
(a rename that cannot overwrite anything), then the old name is unlinked; across
file systems the bytes are copied to a hidden partial file beside the target,
fsynced, hashed, linked into place, and only then is the source unlinked. Both
directories are fsynced so the move survives a power cut. Nothing here removes a
file unless another verified copy of the same bytes is in place.
"""

from __future__ import annotations

import errno
import os
import shutil
from pathlib import Path

from ..core.fsutil import fsync_dir, hash_file

PARTIAL_SUFFIX = ".nearsight-partial"
# link() refusals that mean "this file system has no hard links", not "you may not".
_NO_LINKS = {errno.EPERM, errno.ENOTSUP, errno.EOPNOTSUPP, errno.EMLINK, errno.ENOSYS}


class HashMismatch(Exception):
    """The bytes at the source are not the expected ones (the file changed): nothing was moved."""


def partial_path(dest: Path) -> Path:
    """Where a cross-device copy is written before it is checked and linked into place."""
    return dest.with_name(f".{dest.name}{PARTIAL_SUFFIX}")


def is_regular(path: Path) -> bool:
    try:
        return os.path.isfile(path) and not os.path.islink(path)
    except OSError:
        return False


def holds(path: Path, digest: str) -> bool:
    """Is `path` a regular file (not a link) whose bytes hash to `digest`?"""
    if not is_regular(path):
        return False
    try:
        return hash_file(path) == digest
    except OSError:
        return False


def make_dirs(folder: Path) -> None:
    """mkdir -p, fsyncing each parent that gained a folder, so the path survives a power cut."""
    missing = []
    while not folder.exists():
        missing.append(folder)
        folder = folder.parent
    for path in reversed(missing):
        path.mkdir(exist_ok=True)
        fsync_dir(path.parent)


def _link_into_place(tmp: Path, dest: Path) -> None:
    """Give `tmp` the name `dest` without ever overwriting an existing `dest`."""
    try:
        os.link(tmp, dest)  # same folder, so same file system; fails rather than overwrite
    except OSError as exc:
        if exc.errno not in _NO_LINKS:
            raise
        if os.path.lexists(dest):  # no hard links here (e.g. FAT): check, then rename
            raise FileExistsError(errno.EEXIST, "destination exists", str(dest)) from None
        os.rename(tmp, dest)


def _copy_in(src: Path, dest: Path, digest: str) -> None:
    """Copy src beside dest (fsynced, hashed), then link it into place; raise leaving no trace."""
    tmp = partial_path(dest)
    tmp.unlink(missing_ok=True)  # our own unfinished copy from a killed run, never a user's file
    try:
        with open(src, "rb") as reader, open(tmp, "xb") as writer:
            shutil.copyfileobj(reader, writer, 1 << 20)
            writer.flush()
            os.fsync(writer.fileno())
        shutil.copystat(src, tmp)
        if hash_file(tmp) != digest:
            raise HashMismatch(f"{src} changed while it was being copied")
        _link_into_place(tmp, dest)
    finally:
        tmp.unlink(missing_ok=True)


def move_verified(src: Path, dest: Path, digest: str) -> str:
    """Move `src` to `dest` (which must not exist) and return how: 'same-device' or 'copy'.

    Raises HashMismatch (nothing moved) if the bytes are not `digest`, FileExistsError if
    `dest` exists, and OSError for the file system's refusals (full disk, read-only folder):
    in every failing case `src` is where it was and no new file is left behind.
    """
    src, dest = Path(src), Path(dest)
    make_dirs(dest.parent)
    method = "same-device"
    try:
        os.link(src, dest, follow_symlinks=False)
    except OSError as exc:
        if exc.errno == errno.EEXIST:
            raise
        if exc.errno not in _NO_LINKS | {errno.EXDEV}:
            raise
        _copy_in(src, dest, digest)
        method = "copy"
    try:
        if method == "same-device" and hash_file(dest) != digest:
            raise HashMismatch(f"{src} does not hold the catalogued bytes")
        fsync_dir(dest.parent)
        os.unlink(src)
    except BaseException:
        # Undo: `dest` is our second name (or verified copy) of `src`, which is still in place.
        if os.path.lexists(src):
            os.unlink(dest)
        raise
    fsync_dir(src.parent)
    return method
