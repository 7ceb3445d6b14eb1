"""Reading what a request asks for: numbers from the query string or form, the uploaded image,
a JSON body. Every problem becomes a typed error with a message that says what to send instead.

No value from a request is ever used as a filesystem path: images are named by catalog id,
and an upload's file name is ignored.
"""

from __future__ import annotations

from typing import Any, Mapping

from nearsight.indexer.core.errors import NotFoundError, PayloadTooLargeError, UnsupportedMediaError, UsageError
from nearsight.indexer.core.limits import K, MAX_K, PRECISION, THRESHOLD  # noqa: F401  (MAX_K: the service's name for it)

MAX_ID = 2**63 - 1  # SQLite INTEGER
MULTIPART_SLACK = 64 * 1024  # multipart framing and form fields beside the image
RAW_IMAGE_TYPES = ("application/octet-stream", "")


def check_id(value: int) -> int:
    """An image id from a route: ids beyond SQLite's INTEGER cannot exist (and must not reach SQLite)."""
    if not 0 < value <= MAX_ID:
        raise NotFoundError(f"no image with id {value}")
    return value


def int_arg(source: Mapping[str, Any], name: str, default: int | None, lo: int, hi: int) -> int | None:
    raw = source.get(name)
    if raw is None or raw == "":
        return default
    try:
        value = int(str(raw).strip())
    except ValueError:
        raise UsageError(f"{name} must be a whole number from {lo} to {hi}, not {str(raw)[:40]!r}") from None
    if not lo <= value <= hi:
        raise UsageError(f"{name} must be from {lo} to {hi}, not {value}")
    return value


def id_list(source: Mapping[str, Any], name: str, most: int) -> list[int]:
    """A comma-separated list of 1 to `most` ids (positive whole numbers) from a query string."""
    raw = str(source.get(name) or "").strip()
    try:
        ids = [int(part) for part in raw.split(",") if part.strip()]
    except ValueError:
        raise UsageError(f"{name} must be ids separated by commas, not {raw[:40]!r}") from None
    if not 1 <= len(ids) <= most or any(not 0 < i <= MAX_ID for i in ids):
        raise UsageError(f"{name} must list 1 to {most} ids, each a positive whole number")
    return ids


def bool_arg(source: Mapping[str, Any], name: str, default: bool = False) -> bool:
    """true / false (also 1 / 0, yes / no), any case; absent or empty is `default`."""
    raw = source.get(name)
    if raw is None or raw == "":
        return default
    text = str(raw).strip().lower()
    if text in ("true", "1", "yes"):
        return True
    if text in ("false", "0", "no"):
        return False
    raise UsageError(f"{name} must be true or false, not {str(raw)[:40]!r}")


def search_args(source: Mapping[str, Any]) -> dict:
    """k, threshold and precision, as every search endpoint takes them."""
    def given(name):
        raw = source.get(name)
        return None if raw is None or raw == "" else raw

    k = K.check(given("k"))
    return {"k": 10 if k is None else k, "threshold": THRESHOLD.check(given("threshold")),
            "precision": PRECISION.check(given("precision"))}


def upload(request, limit: int) -> tuple[bytes, Mapping[str, Any]]:
    """The image of a search request and the form fields beside it (empty for a raw body).

    Raw body: Content-Type image/* or application/octet-stream (or none). Multipart: the file
    field ``image`` (or the only file field). Anything else is 415.
    """
    mimetype = (request.mimetype or "").lower()
    if request.content_length is not None and request.content_length > limit + MULTIPART_SLACK:
        raise PayloadTooLargeError(_too_large(request.content_length, limit))
    if mimetype == "multipart/form-data":
        files = request.files
        field = files.get("image") or (next(iter(files.values())) if len(files) == 1 else None)
        if field is None:
            raise UsageError("the multipart body has no image: send it as the file field 'image'")
        data = field.read(limit + 1)
        params = request.form
    elif mimetype.startswith("image/") or mimetype in RAW_IMAGE_TYPES:
        data = request.get_data(cache=False)
        params = {}
    else:
        raise UnsupportedMediaError(
            f"a search takes an image: send its bytes as the body (Content-Type image/... or "
            f"application/octet-stream) or as the multipart/form-data field 'image', not {mimetype}")
    if len(data) > limit:
        raise PayloadTooLargeError(_too_large(len(data), limit))
    if not data:
        raise UsageError("the request carries no image: send the image's bytes as the body")
    return data, params


MAX_CHECK_FILES = 64  # images one POST /v1/check may carry (their bytes together within max_upload_bytes)


def uploads(request, limit: int) -> tuple[list[tuple[str, bytes]], Mapping[str, Any]]:
    """The images of a check request as (name, bytes), and the form fields beside them: in the order sent,
    except that files sharing a field name come together (werkzeug groups a multipart body by field).

    Multipart: every file field, each named by its file name (else its field name; only echoed back in the
    answer, never used as a path). Raw body: one image named "upload". The bytes of all of them together
    are held to `limit`, like one search's image."""
    mimetype = (request.mimetype or "").lower()
    if request.content_length is not None and request.content_length > limit + MULTIPART_SLACK:
        raise PayloadTooLargeError(_too_large(request.content_length, limit))
    if mimetype == "multipart/form-data":
        files = list(request.files.items(multi=True))
        if not files:
            raise UsageError("the multipart body has no files: send each image as a file field")
        if len(files) > MAX_CHECK_FILES:
            raise UsageError(f"a check takes at most {MAX_CHECK_FILES} images a request, not {len(files)}")
        out, total = [], 0
        for field_name, storage in files:
            data = storage.read(limit + 1)
            total += len(data)
            if total > limit:
                raise PayloadTooLargeError(_too_large(total, limit))
            out.append(((storage.filename or field_name)[:255], data))
        return out, request.form
    data, form = upload(request, limit)
    return [("upload", data)], form


def _too_large(size: int, limit: int) -> str:
    return f"the upload is {size} bytes; this server takes images up to {limit} bytes (setting max_upload_bytes)"


def json_body(request) -> Any:
    if (request.mimetype or "").lower() != "application/json":
        raise UnsupportedMediaError(f"send a JSON body (Content-Type application/json), not {request.mimetype or 'none'}")
    body = request.get_json(silent=True)
    if body is None:
        raise UsageError("the body is not valid JSON")
    return body


VERDICT_KEYS = {"file_a", "file_b", "verdict", "note"}
MAX_VERDICTS = 1000


def verdicts_body(body: Any) -> tuple[list[dict], str, str | None]:
    """Pairs, origin and author from a POST /v1/verdicts body: one verdict object, or
    {"verdicts": [...]} with optional "origin" ("api" or "review") and "author"."""
    if not isinstance(body, dict):
        raise UsageError("the body must be a JSON object: a verdict, or {\"verdicts\": [...]}")
    body = dict(body)
    origin = body.pop("origin", "api")
    author = body.pop("author", None)
    if origin not in ("api", "review"):
        raise UsageError(f"origin must be 'api' or 'review', not {str(origin)[:40]!r}")
    if author is not None and (not isinstance(author, str) or len(author) > 200):
        raise UsageError("author must be text of at most 200 characters")
    if "verdicts" in body:
        items = body.pop("verdicts")
        if body:
            raise UsageError(f"unexpected fields beside verdicts: {', '.join(sorted(map(str, body)))}")
        if not isinstance(items, list) or not 1 <= len(items) <= MAX_VERDICTS:
            raise UsageError(f"verdicts must be a list of 1 to {MAX_VERDICTS} verdict objects")
    else:
        items = [body]
    return [_verdict(item, n) for n, item in enumerate(items)], origin, author


def _verdict(item: Any, n: int) -> dict:
    where = f"verdict {n}: " if n else ""
    if not isinstance(item, dict):
        raise UsageError(f"{where}a verdict is an object with file_a, file_b and verdict")
    unknown = set(item) - VERDICT_KEYS
    if unknown:
        raise UsageError(f"{where}unexpected fields {', '.join(sorted(map(str, unknown)))}; "
                         f"a verdict has {', '.join(sorted(VERDICT_KEYS))}")
    for key in ("file_a", "file_b"):
        value = item.get(key)
        if isinstance(value, bool) or not isinstance(value, int) or not 0 < value <= MAX_ID:
            raise UsageError(f"{where}{key} must be an image id (a positive whole number)")
    if item.get("verdict") not in ("same", "different"):
        raise UsageError(f"{where}verdict must be 'same' or 'different'")
    note = item.get("note")
    if note is not None and (not isinstance(note, str) or len(note) > 2000):
        raise UsageError(f"{where}note must be text of at most 2000 characters")
    return {"file_a": item["file_a"], "file_b": item["file_b"], "verdict": item["verdict"], "note": note}


def keeper_body(body: Any) -> tuple[int, str | None]:
    """The file id and author of a POST /v1/keepers body: {"file": id, "author": optional text}."""
    if not isinstance(body, dict) or "file" not in body or set(body) - {"file", "author"}:
        raise UsageError('send {"file": <image id>}, and optionally "author"')
    value, author = body["file"], body.get("author")
    if isinstance(value, bool) or not isinstance(value, int) or not 0 < value <= MAX_ID:
        raise UsageError("file must be an image id (a positive whole number)")
    if author is not None and (not isinstance(author, str) or len(author) > 200):
        raise UsageError("author must be text of at most 200 characters")
    return value, author
