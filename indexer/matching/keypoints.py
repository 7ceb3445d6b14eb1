"""Each small copy's ORB keypoints, found once at index time and kept beside it.

Verifying a query's candidates (indexer/matching/rerank.py) needs each candidate's keypoints: at the
verification side, and for a query whose best candidate did not verify, the fine check's at
twice that side. Found at query time they were most of a query's cost: on the quality
benchmark, 23 core-ms a query for the first set and 14 for the fine one, against 8 for the
query's own (benchmarks/results/query.md). The small copy never changes (it is named by its
content's hash), so its keypoints are found by the index run that made it and kept in a file
beside it, `thumbs/ab/<hash>.kp`; verification reads that file instead.

The file holds both sets exactly as `rerank` would find them from the small copy, so an answer
is the same to the last digit with or without it. Its first line names the settings that made
it (`signature()`); a file made by other settings, torn or unreadable counts as missing, and
verification finds the keypoints itself as before, and the next index run makes it again. The file
also records the small copy's size, so one made again (`verify --repair`) is not matched with the old
keypoints. Cost: up to 100 KB an image (500 + 2,000 keypoints of 40 bytes; 71 KiB on average on the
quality benchmark), 3.5 times the small copy; `keep_keypoints = false` turns it off.
"""

from __future__ import annotations

import functools
import logging
import os
import secrets
import struct
from pathlib import Path

import numpy as np

from ..core.fsutil import FILE_MODE

log = logging.getLogger(__name__)

SUFFIX = ".kp"
_MAGIC = b"NSKP2 "  # 2: the small copy's size after the first line
_SET = struct.Struct("<IHHHHH")  # keypoints, width, height, working width, working height, reason length


def sidecar(small_copy: str | os.PathLike) -> Path:
    """Where the keypoints of a small copy are kept: beside it, same name, `.kp`."""
    return Path(small_copy).with_suffix(SUFFIX)


def is_small_copy(path: str | os.PathLike) -> bool:
    """Whether `path` lies in a store's small-copy folder (`thumbs/ab/<hash>.jpg`): only those have a
    sidecar, so a user's own file is never looked beside."""
    p = Path(path)
    return p.suffix == ".jpg" and p.parent.parent.name == "thumbs" and p.stem[:2] == p.parent.name


@functools.lru_cache(maxsize=1)
def signature() -> bytes:
    """The settings the kept keypoints depend on: both verification configurations and OpenCV's version
    (ORB's output may change with it)."""
    import cv2

    from .rerank import fine_config, verify_config

    def part(c):
        return f"{c.max_side},{c.min_side},{c.n_features},{c.fast_threshold},{c.stretch}"

    return f"{part(verify_config())};{part(fine_config())};cv{cv2.__version__}".encode()


def encode(sets, small_copy_size: int) -> bytes:
    """The bytes of a sidecar holding `sets` (verify.Features, in order: the check's, the fine check's) of a
    small copy of `small_copy_size` bytes (a small copy made again, e.g. by `verify --repair` at another side,
    no longer matches its old sidecar)."""
    chunks = [_MAGIC, signature(), b"\n", struct.pack("<QB", small_copy_size, len(sets))]
    for f in sets:
        reason = f.reason.encode()
        chunks.append(_SET.pack(len(f), *f.size, *f.work_size, len(reason)))
        chunks += [reason, np.ascontiguousarray(f.xy, np.float32).tobytes(),
                   np.ascontiguousarray(f.descriptors, np.uint8).tobytes()]
    return b"".join(chunks)


def header() -> bytes:
    """A usable sidecar's first line: the format and the settings that made it."""
    return _MAGIC + signature() + b"\n"


def decode(data: bytes, small_copy_size: int | None = None) -> list | None:
    """The Features kept in a sidecar's bytes, or None when they are not usable (another format or
    signature, made from a small copy of another size, torn)."""
    from .verify import Features

    if not data.startswith(header()):
        return None
    body = data[len(header()):]
    try:
        size, count = struct.unpack_from("<QB", body)
        if small_copy_size is not None and size != small_copy_size:
            return None
        at, out = struct.calcsize("<QB"), []
        for _ in range(count):
            n, w, h, ww, wh, r = _SET.unpack_from(body, at)
            at += _SET.size
            reason = body[at : at + r].decode()
            at += r
            xy = np.frombuffer(body, np.float32, 2 * n, at).reshape(n, 2)
            at += 8 * n
            descriptors = np.frombuffer(body, np.uint8, 32 * n, at).reshape(n, 32)
            at += 32 * n
            out.append(Features(xy, descriptors, (w, h), (ww, wh), reason))
    except (struct.error, ValueError, UnicodeDecodeError):
        return None
    return out if at == len(body) else None


def read_beside(small_copy: str | os.PathLike, target: Path) -> tuple[int, bytes] | None:
    """(the small copy's size, the bytes of its sidecar `target`), or None when it is not a store's small copy
    or either cannot be read."""
    if not is_small_copy(small_copy):
        return None
    try:
        return os.stat(small_copy).st_size, target.read_bytes()
    except OSError:
        return None


def begins_with(target: Path, expected: bytes) -> bool:
    """Whether the file `target` is there and begins with `expected` (a sidecar's first line)."""
    try:
        with open(target, "rb") as fh:
            return fh.read(len(expected)) == expected
    except OSError:
        return False


def load(small_copy: str | os.PathLike, which: int) -> object | None:
    """Set `which` (0: the check's, 1: the fine check's) kept beside a small copy, or None."""
    read = read_beside(small_copy, sidecar(small_copy))
    if read is None:
        return None
    size, data = read
    sets = decode(data, size)
    if sets is None:
        log.debug("kept keypoints of %s are not usable; finding them again", small_copy)
        return None
    return sets[which] if which < len(sets) else None


def find(small_copy: str | os.PathLike, image=None) -> bytes:
    """A sidecar's bytes for one small copy, both sets found as `rerank` finds them (`image`: the small copy
    read at rerank.VERIFY_SIDE, when the caller has it)."""
    from ..reading.images import read_image
    from .rerank import VERIFY_SIDE, fine_config, verify_config
    from .verify import features_or_reason

    size = os.stat(small_copy).st_size
    image = image if image is not None else read_image(small_copy, max_side=VERIFY_SIDE)[0]
    return encode([features_or_reason(image, verify_config()), features_or_reason(image, fine_config())], size)


def write(small_copy: str | os.PathLike, data: bytes, target: Path | None = None) -> None:
    """Put a sidecar in place atomically (`target`: another sidecar's path than the keypoints'). A cache, so no
    fsync (as the small copy itself): a torn file fails `decode` and is found again."""
    target = sidecar(small_copy) if target is None else target
    tmp = target.with_name(f".{target.name}.{os.getpid()}.{secrets.token_hex(4)}.tmp")
    try:
        with open(tmp, "xb") as fh:
            os.fchmod(fh.fileno(), FILE_MODE)  # the service may run as another user
            fh.write(data)
        os.replace(tmp, target)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise


def _current(small_copy: Path) -> bool:
    """Whether a small copy's sidecar is there and was made by these settings (its first line only)."""
    return begins_with(sidecar(small_copy), header())


def keep_missing(store) -> dict:
    """Find and keep the keypoints of every readable content's small copy that has none kept, or one made by
    other settings (another OpenCV, another verification side), and its same-frame band image (aligned.py) the
    same way; both cores at once (ORB and decoding release the GIL). A small copy that cannot be read is left for verification to report. Returns counts."""
    from ..core.cores import each_on_cores
    from ..core.errors import ImageReadError
    from ..reading.images import read_image
    from . import aligned
    from .rerank import VERIFY_SIDE

    todo = [store.thumb_path(r["hash"]) for r in store.catalog.readable_contents() if r["thumb"]]
    todo = [p for p in todo if not (_current(p) and aligned.current(p)) and p.exists()]

    def one(path: Path) -> bool:
        try:
            image = read_image(path, max_side=VERIFY_SIDE)[0]
            size = os.stat(path).st_size
            if not _current(path):
                write(path, find(path, image))
            if not aligned.current(path):  # the same-frame check's band image (indexer/matching/aligned.py)
                write(path, aligned.encode(aligned.Frame(image), size), aligned.sidecar(path))
            return True
        except (ImageReadError, OSError) as exc:
            log.debug("no keypoints kept for %s: %s", path, exc)
            return False

    done = 0
    for start in range(0, len(todo), 256):  # blocks, so a killed run keeps what it finished
        done += sum(each_on_cores(one, todo[start : start + 256]))
    if todo:
        log.info("keypoints kept for %d small copies (%d could not be read)", done, len(todo) - done)
    return {"kept": done, "failed": len(todo) - done}
