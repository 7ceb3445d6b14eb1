"""Why a file could not be read: every failure mapped to a short, stable reason code.

The codes are stored in the catalog and shown to users, so they never change
meaning: missing, permission, is-directory, symlink-loop, empty, not-image,
truncated, corrupt, too-large, unsupported, io-error. `images` raises them for
decoding; `scan` uses `os_error_reason` for what goes wrong before decoding.
"""

from __future__ import annotations

import errno
import struct
import zlib

from PIL import Image, UnidentifiedImageError, features

from ..core.errors import ImageReadError

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"
HEIF_BRANDS = {b"heic", b"heix", b"hevc", b"hevx", b"heim", b"heis", b"mif1", b"msf1"}
AVIF_BRANDS = {b"avif", b"avis"}
MAGIC = (
    (PNG_SIGNATURE, "PNG"),
    (b"\xff\xd8\xff", "JPEG"),
    (b"GIF87a", "GIF"),
    (b"GIF89a", "GIF"),
    (b"II*\x00", "TIFF"),
    (b"MM\x00*", "TIFF"),
    (b"BM", "BMP"),
)
ERRNO_REASONS = {
    errno.ENOENT: "missing",
    errno.ENOTDIR: "missing",
    errno.EACCES: "permission",
    errno.EPERM: "permission",
    errno.EISDIR: "is-directory",
    errno.ELOOP: "symlink-loop",
}



def os_error_reason(exc: OSError) -> tuple[str, str]:
    """(reason code, detail) for an OSError met while stat-ing or opening a file."""
    if isinstance(exc, FileNotFoundError):
        return "missing", "file vanished or is a broken link"
    reason = ERRNO_REASONS.get(exc.errno, "io-error") if exc.errno is not None else "io-error"
    if reason == "missing":
        return reason, "file vanished or is a broken link"
    return reason, exc.strerror or str(exc)


def translate(exc: BaseException, head: bytes = b"", fp=None, size=None) -> ImageReadError:
    """Map whatever the file system or a decoder raised to one of our stable reasons."""
    name = type(exc).__name__
    text = str(exc)
    if isinstance(exc, UnidentifiedImageError):
        return _unidentified(head, fp)
    if isinstance(exc, OSError) and exc.errno is not None:
        reason = ERRNO_REASONS.get(exc.errno, "io-error")
        detail = exc.strerror or text
        return ImageReadError(reason, f"{detail}: {exc.filename}" if exc.filename else detail)
    if isinstance(exc, MemoryError):
        return ImageReadError("too-large", "not enough memory to decode this image")
    if isinstance(exc, Image.DecompressionBombError):
        return ImageReadError("too-large", text)
    lowered = text.lower()
    if isinstance(exc, EOFError) or "truncated" in lowered or "premature end" in lowered:
        # Pillow's own words ("image file is truncated (0 bytes not processed)") say nothing a person can act on.
        return ImageReadError("truncated", "the file ends before the image does (an interrupted download or copy?)")
    promised = int.from_bytes(head[4:8], "little") + 8 if head[:4] == b"RIFF" else 0
    if size is not None and promised > size:
        # WebP's decoder only says it failed; the RIFF header says how long the file should be.
        return ImageReadError(
            "truncated", f"RIFF header promises {promised} bytes, the file has {size}"
        )
    if isinstance(exc, NotImplementedError) or any(
        word in lowered for word in ("not supported", "unsupported", "not available")
    ):
        return ImageReadError("unsupported", text or name)
    return ImageReadError("corrupt", f"{name}: {text}" if text else name)


def _unidentified(head: bytes, fp) -> ImageReadError:
    """Pillow found no format: say whether the content looks like a damaged image."""
    if head[4:8] == b"ftyp":
        brand = head[8:12]
        if brand in HEIF_BRANDS or brand in AVIF_BRANDS:
            kind = "AVIF" if brand in AVIF_BRANDS else "HEIC/HEIF"
            decodable = (
                features.check_module("avif") if kind == "AVIF" else "HEIF" in Image.OPEN
            )
            if not decodable:
                return ImageReadError(
                    "unsupported",
                    f"{kind} image; install the optional pillow-heif package to read it",
                )
            return ImageReadError("corrupt", f"{kind} header could not be parsed")
    if head[:4] == b"RIFF" and head[8:12] == b"WEBP":
        return ImageReadError("corrupt", "WEBP header could not be parsed")
    for magic, kind in MAGIC:
        if head.startswith(magic):
            problem = png_crc_problem(fp) if kind == "PNG" and fp is not None else None
            return ImageReadError("corrupt", problem or f"{kind} header could not be parsed")
    return ImageReadError("not-image", "content is not a recognised image format")


def png_crc_problem(fp) -> str | None:
    """Check every PNG chunk's CRC-32 (which Pillow skips for image data).

    Returns a description of the first bad chunk, or None. A file that simply
    ends early is left to the decoder to judge.
    """
    fp.seek(len(PNG_SIGNATURE))
    while True:
        offset = fp.tell()
        header = fp.read(8)
        if len(header) < 8:
            return None
        length, kind = struct.unpack(">I4s", header)
        crc = zlib.crc32(kind)
        remaining = length
        while remaining:
            block = fp.read(min(remaining, 1 << 20))
            if not block:
                return None
            crc = zlib.crc32(block, crc)
            remaining -= len(block)
        stored = fp.read(4)
        if len(stored) < 4:
            return None
        if struct.unpack(">I", stored)[0] != crc:
            return f"bad CRC in PNG {kind.decode('latin-1')!r} chunk at byte {offset}"
        if kind == b"IEND":
            return None
