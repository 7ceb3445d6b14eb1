"""The OpenAPI 3.0 description of the JSON API, kept beside the routes it describes.

tests/test_service_api.py checks that its paths and methods are exactly the application's
routes, and the property tests (schemathesis) check the answers against these schemas.
"""

from __future__ import annotations

from nearsight.indexer.core.limits import PRECISION, THRESHOLD

from .params import MAX_K

TIER_NAMES = ["same-bytes", "same-pixels", "person-same", "near-duplicate", "similar"]
ACTION_TIER_NAMES = TIER_NAMES[:-1]
EVIDENCE_NAMES = ["same-bytes", "same-pixels", "person-same", "verified", "unverified (opted in)"]
ERROR_STATUSES = {
    "400": "The request is malformed: a parameter out of range, a bad body",
    "401": "The API key is missing or wrong (header Authorization: Bearer <key>)",
    "403": "This server refuses the request in every case (e.g. writing with no API key configured)",
    "404": "No such image or group",
    "409": "Not ready: no generation is served yet, or the image has no vector, or no calibration for a precision",
    "413": "The upload is larger than max_upload_bytes",
    "415": "The body is not of a media type this endpoint takes",
    "422": "The upload is not a readable image, or has more pixels than allowed",
    "429": "This client sent more uploads or writes in the last minute than allowed (rate_uploads, rate_writes); "
           "the header Retry-After says in how many seconds to try again",
    "503": "The server is decoding as many uploads as it may at once (max_decodes); try again after Retry-After",
}


def _ref(name: str) -> dict:
    return {"$ref": f"#/components/schemas/{name}"}


def _json(schema: dict, description: str) -> dict:
    return {"description": description, "content": {"application/json": {"schema": schema}}}


def _errors(*codes: str) -> dict:
    return {code: {"$ref": f"#/components/responses/E{code}"} for code in codes}


def _int_param(name: str, where: str, description: str, minimum: int, maximum: int | None = None,
               default: int | None = None, required: bool = False) -> dict:
    schema: dict = {"type": "integer", "minimum": minimum}
    if maximum is not None:
        schema["maximum"] = maximum
    if default is not None:
        schema["default"] = default
    return {"name": name, "in": where, "required": required, "description": description, "schema": schema}


IMAGE_ID = _int_param("image_id", "path", "Catalog id of an image file", 1, 2**63 - 1, required=True)
SEARCH_PARAMS = [
    _int_param("k", "query", "Neighbours to return", 1, MAX_K, default=10),
    {"name": "threshold", "in": "query", "required": False,
     "description": "Similarity at or above which a neighbour is called a duplicate (default: the "
                    "generation's calibrated or default threshold). Not together with precision.",
     "schema": THRESHOLD.schema()},
    {"name": "precision", "in": "query", "required": False,
     "description": "Instead of a threshold: the calibrated threshold that reaches this precision "
                    "(409 when the generation has no calibration).",
     "schema": PRECISION.schema()},
]
NULLABLE_NUMBER = {"type": "number", "nullable": True}
NULLABLE_INT = {"type": "integer", "nullable": True}
NULLABLE_STRING = {"type": "string", "nullable": True}

SCHEMAS = {
    "Error": {
        "type": "object", "required": ["error", "message"],
        "properties": {"error": {"type": "string", "description": "stable code, e.g. not_found"},
                       "message": {"type": "string", "description": "what went wrong and what to do"},
                       "reason": {"type": "string", "description": "for unreadable images: not-image, too-large, ..."}},
    },
    "Evidence": {
        "type": "object", "nullable": True,
        "description": "geometric verification of this candidate, by keypoints or by the same-frame check (null when it was not checked)",
        "required": ["verified", "inliers", "matches", "box", "query_box", "scale", "mirrored", "reason"],
        "properties": {"verified": {"type": "boolean"},
                       "inliers": {"type": "integer", "description": "keypoint matches that agree with one transform"},
                       "matches": {"type": "integer"},
                       "box": {"type": "array", "nullable": True, "items": {"type": "number"},
                               "description": "where the query lies in the candidate: x0, y0, x1, y1 as fractions "
                                              "of the candidate's width and height"},
                       "query_box": {"type": "array", "nullable": True, "items": {"type": "number"},
                                     "description": "where the candidate lies in the query, as fractions of the "
                                                    "query's width and height"},
                       "scale": NULLABLE_NUMBER, "mirrored": {"type": "boolean"},
                       "reason": {"type": "string"},
                       "correlation": {"type": "number", "nullable": True,
                                       "description": "the same-frame check's band correlation, -1 to 1, when "
                                                      "keypoints did not confirm the candidate and both frames have "
                                                      "the same shape; from 0.75 it confirms the candidate"}},
    },
    "Neighbour": {
        "type": "object",
        "required": ["id", "path", "similarity", "descriptor_similarity", "evidence", "duplicate", "probability"],
        "properties": {"id": {"type": "integer"}, "path": NULLABLE_STRING,
                       "similarity": {"type": "number", "description": "the score, higher is closer, comparable "
                                      "across queries: the descriptors' score less the query's background statistic "
                                      "(score_norm), moved halfway to 1 when geometric verification confirms the match"},
                       "descriptor_similarity": {"type": "number", "description": "the descriptors' score alone "
                                                 "(learned and classical cosines, weighed)"},
                       "evidence": {"$ref": "#/components/schemas/Evidence"},
                       "duplicate": {"type": "boolean", "description": "by default, similarity >= the generation's "
                                     "query verdict threshold (calibrated for a stated share of false flags per query); "
                                     "with a threshold or precision in the request, or without a query verdict, "
                                     "descriptor_similarity (moved halfway to 1 when verified) >= threshold"},
                       "probability": {**NULLABLE_NUMBER, "description": "calibrated probability that this result "
                                       "is a copy of the query (isotonic regression on the collection's own "
                                       "synthetic copies and non-copies, at the copy_prior setting); null without "
                                       "a query verdict"}},
    },
    "SearchResult": {
        "type": "object", "required": ["generation", "model", "k", "threshold", "threshold_from", "query", "results"],
        "properties": {
            "generation": {"type": "string"}, "model": {"type": "string"}, "k": {"type": "integer"},
            "threshold": {"type": "number"},
            "threshold_from": {"type": "string", "enum": ["generation", "request", "precision"]},
            "query": {"type": "object", "description": "the uploaded image's size and format, or the image id asked about"},
            "results": {"type": "array", "items": _ref("Neighbour")},
        },
    },
    "CheckResult": {
        "type": "object", "required": ["generation", "model", "threshold", "threshold_from", "counts", "results"],
        "properties": {
            "generation": {"type": "string"}, "model": {"type": "string"}, "threshold": {"type": "number"},
            "threshold_from": {"type": "string", "enum": ["generation", "request", "precision"]},
            "counts": {"type": "object", "additionalProperties": {"type": "integer"},
                       "description": "uploads per verdict"},
            "results": {"type": "array", "description": "one per uploaded image", "items": {
                "type": "object", "required": ["path", "verdict", "match", "error"],
                "description": "in the order sent (files sharing a field name together)",
                "properties": {
                    "path": {"type": "string", "description": "the upload's file name (else its field name), "
                                                              "only echoed back"},
                    "verdict": {"type": "string", "enum": ["copy", "similar", "new", "unreadable"]},
                    "match": {"type": "object", "nullable": True, "description": "the best catalogued match "
                              "(id, path, similarity, probability, evidence); evidence {same_bytes: true} for a "
                              "byte-identical file, found by content hash before decoding"},
                    "error": {"type": "object", "nullable": True, "description": "why an unreadable upload "
                              "could not be read (error, reason, message)"}}}},
        },
    },
    "Image": {
        "type": "object", "required": ["id", "path", "state"],
        "properties": {
            "id": {"type": "integer"}, "path": {"type": "string"},
            "state": {"type": "string", "description": "ok, unreadable, removed, quarantined"},
            "reason": NULLABLE_STRING, "size": NULLABLE_INT, "mtime": NULLABLE_NUMBER,
            "width": NULLABLE_INT, "height": NULLABLE_INT, "format": NULLABLE_STRING,
            "content_hash": NULLABLE_STRING, "first_seen": NULLABLE_NUMBER, "last_seen": NULLABLE_NUMBER,
            "group": {"type": "string", "nullable": True, "description": "gid of its group in the served generation"},
            "generation": NULLABLE_STRING,
        },
    },
    "MemberBrief": {
        "type": "object", "required": ["id", "tier", "similarity"],
        "properties": {"id": {"type": "integer"}, "tier": {"type": "string", "enum": TIER_NAMES},
                       "similarity": {"type": "number", "description": "cosine to the group's keeper"},
                       "path": NULLABLE_STRING, "width": NULLABLE_INT, "height": NULLABLE_INT,
                       "file_size": NULLABLE_INT,
                       "name": {"type": "string", "description": "the file's name"},
                       "folder": {"type": "string", "description": "its folder relative to its source ('.' at "
                                                                   "the source's top)"}},
    },
    "GroupBrief": {
        "type": "object", "required": ["gid", "tier", "size", "keeper", "members"],
        "properties": {"gid": {"type": "string"}, "tier": {"type": "string", "enum": TIER_NAMES},
                       "size": {"type": "integer"}, "keeper": {"type": "integer"},
                       "reclaimable_bytes": {"type": "integer"}, "best_similarity": NULLABLE_NUMBER,
                       "members": {"type": "array", "items": _ref("MemberBrief")}},
    },
    "GroupPage": {
        "type": "object", "required": ["generation", "total", "offset", "limit", "groups"],
        "properties": {"generation": {"type": "string"}, "total": {"type": "integer"},
                       "offset": {"type": "integer"}, "limit": {"type": "integer"},
                       "groups": {"type": "array", "items": _ref("GroupBrief")}},
    },
    "PlannedMove": {
        "type": "object", "required": ["id", "path", "size", "content_hash", "tier", "evidence"],
        "properties": {"id": {"type": "integer"}, "path": {"type": "string"}, "dest_relative": {"type": "string"},
                       "size": {"type": "integer"}, "content_hash": {"type": "string"},
                       "tier": {"type": "string", "enum": ACTION_TIER_NAMES, "description": "relation to the keeper"},
                       "evidence": {"type": "string", "enum": EVIDENCE_NAMES,
                                    "description": "what allows it to move: the same bytes or pixels, a person's "
                                                   "'same', a near-duplicate match confirmed by geometric "
                                                   "verification, or (only with include_unverified) a learned "
                                                   "match alone"}},
    },
    "LeftFile": {
        "type": "object", "required": ["id", "path", "reason"],
        "properties": {"id": {"type": "integer"}, "path": {"type": "string"}, "reason": {"type": "string"}},
    },
    "Plan": {
        "type": "object",
        "required": ["generation", "tier", "include_unverified", "rules", "summary", "total", "offset", "limit",
                     "groups"],
        "properties": {
            "generation": {"type": "string"}, "tier": {"type": "string", "enum": ACTION_TIER_NAMES},
            "include_unverified": {"type": "boolean"}, "rules": {"type": "object"},
            "summary": {"type": "object", "properties": {
                "groups": {"type": "integer"}, "files": {"type": "integer"}, "bytes_freed": {"type": "integer"},
                "kept": {"type": "integer"}, "skipped": {"type": "integer"},
                "unverified": {"type": "integer", "description": "near-duplicates left in place: not verified"},
                "evidence": {"type": "object", "description": "files to move, by evidence",
                             "additionalProperties": {"type": "integer"}},
                "similar_groups_ignored": {"type": "integer"}}},
            "total": {"type": "integer"}, "offset": {"type": "integer"}, "limit": {"type": "integer"},
            "groups": {"type": "array", "items": {
                "type": "object", "required": ["gid", "tier", "keeper", "moves", "kept", "skipped", "unverified"],
                "properties": {"gid": {"type": "string"}, "tier": {"type": "string", "enum": TIER_NAMES},
                               "keeper": {"type": "object", "description": "id, path, and reason: why this "
                                          "member is the keeper, in plain words (the keeper rule that decided)"},
                               "moves": {"type": "array", "items": _ref("PlannedMove")},
                               "kept": {"type": "array", "items": _ref("LeftFile")},
                               "skipped": {"type": "array", "items": _ref("LeftFile")},
                               "unverified": {"type": "array", "items": _ref("LeftFile"),
                                              "description": "near-duplicates left in place because geometric "
                                                             "verification did not confirm their match to the "
                                                             "keeper, with the reason"},
                               "bytes_freed": {"type": "integer"}}}},
        },
    },
    "Group": {
        "type": "object", "required": ["generation", "gid", "tier", "keeper", "size", "members", "verdicts"],
        "properties": {
            "generation": {"type": "string"}, "gid": {"type": "string"},
            "tier": {"type": "string", "enum": TIER_NAMES}, "keeper": {"type": "integer"},
            "size": {"type": "integer"}, "reclaimable_bytes": {"type": "integer"},
            "members": {"type": "array", "items": {
                "type": "object", "required": ["id", "tier", "similarity", "path"],
                "properties": {"id": {"type": "integer"}, "tier": {"type": "string", "enum": TIER_NAMES},
                               "similarity": {"type": "number"}, "path": {"type": "string"},
                               "content_hash": {"type": "string"}, "pixel_hash": NULLABLE_STRING,
                               "width": {"type": "integer"}, "height": {"type": "integer"},
                               "file_size": {"type": "integer"}, "format": {"type": "string"},
                               "mtime": {"type": "number"},
                               "captured": {**NULLABLE_STRING, "description": "EXIF capture time, ISO 8601"},
                               "camera": {**NULLABLE_STRING, "description": "EXIF make and model"},
                               "icc": {"type": "boolean", "description": "embeds an ICC colour profile"}}}},
            "verdicts": {"type": "array", "description": "the latest verdict on each judged pair of members",
                         "items": {"type": "object", "required": ["a", "b", "verdict"],
                                   "properties": {"a": {"type": "integer"}, "b": {"type": "integer"},
                                                  "verdict": {"type": "string", "enum": ["same", "different"]},
                                                  "origin": {"type": "string"}, "created_at": {"type": "number"},
                                                  "id": {"type": "integer"}}}},
            "now": {"$ref": "#/components/schemas/GroupNow"},
        },
    },
    "GroupNow": {
        "type": "object", "nullable": True,
        "description": "the group as a quarantine would see it now (null when fewer than two of its files are "
                       "present): the file to keep and why, each member's metadata, what would happen to it and "
                       "where it matches the keeper",
        "required": ["gid", "tier", "keeper", "keeper_reason", "picked", "members"],
        "properties": {
            "gid": {"type": "string"}, "tier": {"type": "string", "enum": TIER_NAMES},
            "keeper": {"type": "integer"},
            "keeper_reason": {"type": "string", "description": "why it is kept, in plain words"},
            "picked": {"type": "boolean", "description": "the keeper is a person's choice (POST /v1/keepers)"},
            "members": {"type": "array", "description": "the keeper first", "items": {
                "type": "object",
                "required": ["id", "tier", "path", "width", "height", "file_size", "format", "captured", "camera",
                             "icc", "modified", "action", "why", "similarity", "match"],
                "properties": {
                    "id": {"type": "integer"}, "tier": {"type": "string", "enum": TIER_NAMES},
                    "path": {"type": "string"}, "folder": {"type": "string"},
                    "width": {"type": "integer"}, "height": {"type": "integer"}, "file_size": {"type": "integer"},
                    "format": {"type": "string"}, "captured": NULLABLE_STRING, "camera": NULLABLE_STRING,
                    "icc": {"type": "boolean"}, "modified": {"type": "string", "description": "ISO 8601, UTC"},
                    "action": {"type": "string", "enum": ["keep", "move", "stay", "changed"]},
                    "why": {"type": "string"}, "similarity": {"type": "number"},
                    "match": {"type": "object", "nullable": True,
                              "description": "geometric verification against the keeper (null for the keeper)",
                              "required": ["verified", "inliers", "reason", "keeper_box", "member_box"],
                              "properties": {
                                  "verified": {"type": "boolean"}, "inliers": {"type": "integer", "nullable": True},
                                  "reason": {"type": "string"},
                                  "keeper_box": {"type": "array", "nullable": True, "items": {"type": "number"},
                                                 "description": "the common region in the keeper: x0, y0, x1, y1 "
                                                                "as fractions of its width and height"},
                                  "member_box": {"type": "array", "nullable": True, "items": {"type": "number"},
                                                 "description": "the common region in this file"}}}}}},
        },
    },
    "KeeperPick": {
        "type": "object", "required": ["id", "file", "created_at"],
        "properties": {"id": {"type": "integer"}, "file": {"type": "integer"}, "author": NULLABLE_STRING,
                       "created_at": {"type": "number"}},
    },
    "PairFile": {
        "type": "object", "required": ["id", "path"],
        "properties": {"id": {"type": "integer"}, "path": {"type": "string"}, "width": {"type": "integer"},
                       "height": {"type": "integer"}, "file_size": {"type": "integer"}},
    },
    "ReviewPair": {
        "type": "object", "required": ["a", "b", "similarity", "probability", "round", "why"],
        "properties": {
            "a": _ref("PairFile"), "b": _ref("PairFile"),
            "similarity": {"type": "number", "description": "the pair's score, as groups were built from it"},
            "probability": {**NULLABLE_NUMBER, "description": "estimated probability that a person calls the pair "
                            "the same picture (see probability_from); null without a calibration"},
            "round": {"type": "integer", "minimum": 0,
                      "description": "pairs are dealt in rounds; within a round each image is in at most one pair"},
            "why": {"type": "string", "description": "why the pair is offered, in words"},
        },
    },
    "ReviewPage": {
        "type": "object",
        "required": ["generation", "threshold", "probability_from", "left_out", "total", "offset", "limit", "pairs"],
        "properties": {
            "generation": {"type": "string"},
            "threshold": {"type": "number", "description": "the near-duplicate threshold groups are built at"},
            "probability_from": {"type": "string", "nullable": True, "enum": ["verdicts", "calibration", None],
                                 "description": "verdicts: the isotonic fit to a person's verdicts; calibration: "
                                                "the pairwise mixture's posterior; null: no calibration, pairs "
                                                "ordered by closeness to the threshold"},
            "left_out": {"type": "object", "description": "pairs not offered, per reason (judged, same-bytes, "
                                                          "same-pixels, absent)",
                         "additionalProperties": {"type": "integer"}},
            "total": {"type": "integer"}, "offset": {"type": "integer"}, "limit": {"type": "integer"},
            "pairs": {"type": "array", "items": _ref("ReviewPair")},
        },
    },
    "VerdictIn": {
        "type": "object", "required": ["file_a", "file_b", "verdict"], "additionalProperties": False,
        "properties": {"file_a": {"type": "integer", "minimum": 1}, "file_b": {"type": "integer", "minimum": 1},
                       "verdict": {"type": "string", "enum": ["same", "different"]},
                       "note": {"type": "string", "maxLength": 2000}},
    },
    "VerdictsIn": {
        "type": "object", "required": ["verdicts"],
        "properties": {"verdicts": {"type": "array", "minItems": 1, "maxItems": 1000, "items": _ref("VerdictIn")},
                       "origin": {"type": "string", "enum": ["api", "review"], "default": "api"},
                       "author": {"type": "string", "maxLength": 200}},
    },
    "VerdictsStored": {
        "type": "object", "required": ["stored", "verdicts"],
        "properties": {"stored": {"type": "integer"}, "at": {"type": "number"},
                       "verdicts": {"type": "array", "items": {
                           "type": "object", "required": ["id", "file_a", "file_b", "verdict"],
                           "properties": {"id": {"type": "integer"}, "file_a": {"type": "integer"},
                                          "file_b": {"type": "integer"},
                                          "verdict": {"type": "string", "enum": ["same", "different"]}}}}},
    },
    "VerdictPage": {
        "type": "object", "required": ["total", "offset", "limit", "verdicts"],
        "properties": {"total": {"type": "integer"}, "offset": {"type": "integer"}, "limit": {"type": "integer"},
                       "verdicts": {"type": "array", "items": {
                           "type": "object", "required": ["id", "file_a", "file_b", "verdict", "origin", "created_at"],
                           "properties": {"id": {"type": "integer"}, "file_a": NULLABLE_INT, "file_b": NULLABLE_INT,
                                          "verdict": {"type": "string", "enum": ["same", "different"]},
                                          "origin": {"type": "string"}, "author": NULLABLE_STRING,
                                          "note": NULLABLE_STRING, "created_at": {"type": "number"}}}}},
    },
    "Status": {
        "type": "object", "required": ["files", "ok", "unreadable", "removed", "model", "generation", "thresholds",
                                       "calibration", "service"],
        "properties": {
            "files": {"type": "integer"}, "ok": {"type": "integer"}, "unreadable": {"type": "integer"},
            "removed": {"type": "integer"}, "distinct_contents": {"type": "integer"},
            "model": NULLABLE_STRING,
            "generation": {"type": "object", "nullable": True, "description": "the generation being served",
                           "properties": {"name": {"type": "string"}, "model": {"type": "string"},
                                          "indexed": {"type": "integer"}, "groups": {"type": "integer"}}},
            "questions": {"type": "object", "nullable": True,
                          "description": "the two calibrated questions: `query` (is this result a copy of my image? "
                                         "threshold on `similarity`, share of false flags per query, recall) and "
                                         "`groups` (which pairs in this collection are copies? threshold on "
                                         "`descriptor_similarity`, where it comes from, expected duplicate pairs); "
                                         "null without a calibration"},
            "published_generation": {"type": "string", "nullable": True,
                                     "description": "the generation the store names now (swapped in shortly if newer)"},
            "thresholds": {"type": "object", "nullable": True},
            "calibration": {"type": "object", "nullable": True, "description": "the calibration's summary, or null"},
            "service": {"type": "object"},
        },
    },
}

BINARY = {"schema": {"type": "string", "format": "binary"}}


def _paths() -> dict:
    read_errors = ("401",)
    return {
        "/healthz": {"get": {
            "operationId": "healthz", "summary": "Liveness: the process answers", "security": [],
            "responses": {"200": _json({"type": "object", "required": ["status"],
                                        "properties": {"status": {"type": "string"}}}, "Alive")}}},
        "/readyz": {"get": {
            "operationId": "readyz", "summary": "Readiness: a generation is loaded and queries can be answered",
            "security": [],
            "responses": {"200": _json({"type": "object", "required": ["status", "generation"],
                                        "properties": {"status": {"type": "string"},
                                                       "generation": {"type": "string"}}}, "Ready"),
                          "503": _json({"type": "object", "required": ["status", "message"],
                                        "properties": {"status": {"type": "string"}, "message": {"type": "string"}}},
                                       "No generation loaded yet")}}},
        "/metrics": {"get": {
            "operationId": "metrics", "summary": "Prometheus metrics (text exposition format)",
            "responses": {"200": {"description": "Metrics", "content": {"text/plain": {"schema": {"type": "string"}}}},
                          **_errors(*read_errors)}}},
        "/v1/openapi.json": {"get": {
            "operationId": "openapi", "summary": "This document",
            "responses": {"200": _json({"type": "object"}, "OpenAPI 3.0 document"), **_errors(*read_errors)}}},
        "/v1/status": {"get": {
            "operationId": "status", "summary": "Counts, model, served generation, thresholds, calibration summary",
            "responses": {"200": _json(_ref("Status"), "Status"), **_errors(*read_errors)}}},
        "/v1/search": {"post": {
            "operationId": "search", "summary": "Images similar to an uploaded image, best first",
            "description": "Send the image as the raw body (Content-Type image/... or application/octet-stream) "
                           "or as the multipart/form-data file field `image` (k, threshold and precision may "
                           "then also be form fields). The file name of an upload is ignored.",
            "parameters": SEARCH_PARAMS,
            "requestBody": {"required": True, "content": {
                "image/jpeg": BINARY, "image/png": BINARY, "image/webp": BINARY, "application/octet-stream": BINARY,
                "multipart/form-data": {"schema": {
                    "type": "object", "required": ["image"],
                    "properties": {"image": {"type": "string", "format": "binary"},
                                   "k": {"type": "integer", "minimum": 1, "maximum": MAX_K},
                                   "threshold": THRESHOLD.schema(),
                                   "precision": PRECISION.schema()}}}}},
            "responses": {"200": _json(_ref("SearchResult"), "Neighbours of the uploaded image"),
                          **_errors("400", *read_errors, "409", "413", "415", "422", "429", "503")}}},
        "/v1/check": {"post": {
            "operationId": "check", "summary": "New material against the archive: copy, similar, new or unreadable",
            "description": "The same answer as `nearsight check`, for a batch of uploads: send each image as a "
                           "multipart/form-data file field (any field name; up to 64 images, their bytes together "
                           "within max_upload_bytes), or one image as the raw body. A byte-identical upload is a "
                           "copy by content hash before any decoding; an upload that is not a readable image gets "
                           "the verdict unreadable, and the others are still answered. Nothing is added to the "
                           "store.",
            "parameters": [p for p in SEARCH_PARAMS if p["name"] != "k"],
            "requestBody": {"required": True, "content": {
                "image/jpeg": BINARY, "image/png": BINARY, "image/webp": BINARY, "application/octet-stream": BINARY,
                "multipart/form-data": {"schema": {
                    "type": "object",
                    "additionalProperties": {"type": "string", "format": "binary"},
                    "properties": {"threshold": THRESHOLD.schema(), "precision": PRECISION.schema()}}}}},
            "responses": {"200": _json(_ref("CheckResult"), "A verdict for each upload"),
                          **_errors("400", *read_errors, "409", "413", "415", "429", "503")}}},
        "/v1/images/{image_id}": {"get": {
            "operationId": "image", "summary": "One catalogued image file", "parameters": [IMAGE_ID],
            "responses": {"200": _json(_ref("Image"), "The image"), **_errors(*read_errors, "404")}}},
        "/v1/images/{image_id}/similar": {"get": {
            "operationId": "similar", "summary": "Images similar to a catalogued image (itself left out)",
            "parameters": [IMAGE_ID, *SEARCH_PARAMS],
            "responses": {"200": _json(_ref("SearchResult"), "Neighbours of the image"),
                          **_errors("400", *read_errors, "404", "409")}}},
        "/v1/images/{image_id}/thumbnail": {"get": {
            "operationId": "thumbnail", "summary": "The small JPEG copy of a catalogued image",
            "parameters": [IMAGE_ID],
            "responses": {"200": {"description": "JPEG", "content": {"image/jpeg": BINARY}},
                          "304": {"description": "Not modified (If-None-Match matched the content hash)"},
                          **_errors(*read_errors, "404", "422")}}},
        "/v1/images/{image_id}/preview": {"get": {
            "operationId": "preview", "summary": "A catalogued image at up to `side` pixels, as JPEG",
            "parameters": [IMAGE_ID, _int_param("side", "query", "Longest side in pixels", 16, 4096, default=1600)],
            "responses": {"200": {"description": "JPEG", "content": {"image/jpeg": BINARY}},
                          **_errors("400", *read_errors, "404", "422")}}},
        "/v1/groups": {"get": {
            "operationId": "groups",
            "summary": "Duplicate groups of the served generation as the latest verdicts leave them, largest first",
            "description": "A pair marked different is never in one group (its group is split again without "
                           "chaining); a pair marked same is (a member joined this way has tier person-same).",
            "parameters": [
                {"name": "tier", "in": "query", "required": False, "description": "Only groups of this tier",
                 "schema": {"type": "string", "enum": TIER_NAMES}},
                _int_param("min_size", "query", "Only groups of at least this many files", 1, 10**9, default=2),
                _int_param("max_size", "query", "Only groups of at most this many files", 1, 10**9),
                _int_param("limit", "query", "Groups per page", 1, 200, default=20),
                _int_param("offset", "query", "Groups to skip", 0, 10**9, default=0),
            ],
            "responses": {"200": _json(_ref("GroupPage"), "One page of groups"),
                          **_errors("400", *read_errors, "409")}}},
        "/v1/groups/{gid}": {"get": {
            "operationId": "group", "summary": "One group with every member and the verdicts on its pairs",
            "parameters": [{"name": "gid", "in": "path", "required": True, "schema": {"type": "string"}}],
            "responses": {"200": _json(_ref("Group"), "The group"), **_errors(*read_errors, "404", "409")}}},
        "/v1/plan": {"get": {
            "operationId": "plan",
            "summary": "The quarantine dry run: per group, the keeper and the files `nearsight quarantine --apply` "
                       "would move, with the evidence for each (read-only; moving happens only from the command line)",
            "description": "Lists the groups with a file to move or a near-duplicate left in place because "
                           "geometric verification did not confirm it.",
            "parameters": [
                {"name": "tier", "in": "query", "required": False,
                 "description": "The weakest relation to the keeper acted on (default near-duplicate)",
                 "schema": {"type": "string", "enum": ACTION_TIER_NAMES}},
                {"name": "include_unverified", "in": "query", "required": False,
                 "description": "Also move near-duplicates that geometric verification did not confirm "
                                "(`quarantine --include-unverified`)",
                 "schema": {"type": "boolean", "default": False}},
                _int_param("limit", "query", "Groups per page", 1, 200, default=20),
                _int_param("offset", "query", "Groups to skip", 0, 10**9, default=0),
            ],
            "responses": {"200": _json(_ref("Plan"), "One page of the plan"),
                          **_errors("400", *read_errors, "409")}}},
        "/v1/review/pairs": {"get": {
            "operationId": "review_pairs",
            "summary": "The pairs whose verdict would tell most about the duplicate threshold, best first",
            "description": "Pairs near the near-duplicate threshold that no one has judged yet (nor of the same "
                           "bytes or pixels), the estimated probability of \"same\" nearest one half first, dealt "
                           "so that each image is in at most one pair per round. A pair judged through "
                           "POST /v1/verdicts leaves the queue with the next request.",
            "parameters": [_int_param("limit", "query", "Pairs per page", 1, 200, default=20),
                           _int_param("offset", "query", "Pairs to skip", 0, 10**9, default=0)],
            "responses": {"200": _json(_ref("ReviewPage"), "One page of pairs to judge"),
                          **_errors("400", *read_errors, "409")}}},
        "/v1/verdicts": {
            "get": {
                "operationId": "verdicts", "summary": "The latest verdict on each judged pair, newest first",
                "parameters": [_int_param("limit", "query", "Verdicts per page", 1, 1000, default=100),
                               _int_param("offset", "query", "Verdicts to skip", 0, 10**9, default=0)],
                "responses": {"200": _json(_ref("VerdictPage"), "One page of verdicts"),
                              **_errors("400", *read_errors)}},
            "post": {
                "operationId": "add_verdicts",
                "summary": "Store a person's same / different verdicts on pairs of images (needs the API key)",
                "description": "One verdict object, or {\"verdicts\": [...]} with optional origin and author. "
                               "A pair must be two present files with different contents. All or none are stored.",
                "requestBody": {"required": True, "content": {"application/json": {
                    "schema": {"oneOf": [_ref("VerdictIn"), _ref("VerdictsIn")]}}}},
                "responses": {"201": _json(_ref("VerdictsStored"), "Stored"),
                              **_errors("400", "401", "403", "404", "415", "429")}},
            "delete": {
                "operationId": "remove_verdicts",
                "summary": "Take back verdicts by id, e.g. the review page's undo (needs the API key)",
                "description": "The verdicts before them on the same pairs count again at the next read.",
                "parameters": [{"name": "ids", "in": "query", "required": True, "style": "form", "explode": False,
                                "description": "1 to 1,000 verdict ids, separated by commas",
                                "schema": {"type": "array", "items": {"type": "integer", "minimum": 1},
                                           "minItems": 1, "maxItems": 1000}}],
                "responses": {"200": _json({"type": "object", "required": ["removed", "asked"],
                                            "properties": {"removed": {"type": "integer"},
                                                           "asked": {"type": "integer"}}},
                                           "How many of the verdicts asked for were there and are gone"),
                              **_errors("400", "401", "403", "429")}},
        },
        "/v1/keepers": {"post": {
            "operationId": "pick_keeper",
            "summary": "Keep this file in its group: a person's choice, before every other keeper rule "
                       "(needs the API key)",
            "description": "The quarantine plan, the keep list and the review page keep it from now on, whatever "
                           "generation groups it; the latest pick among a group's files wins. Nothing moves.",
            "requestBody": {"required": True, "content": {"application/json": {"schema": {
                "type": "object", "required": ["file"],
                "properties": {"file": {"type": "integer", "minimum": 1},
                               "author": {"type": "string", "maxLength": 200}},
                "additionalProperties": False}}}},
            "responses": {"201": _json(_ref("KeeperPick"), "Stored"),
                          **_errors("400", "401", "403", "404", "415", "429")}}},
        "/v1/keepers/{image_id}": {"delete": {
            "operationId": "drop_keeper",
            "summary": "Forget a person's choice of this file: the keeper rules choose again (needs the API key)",
            "parameters": [{"name": "image_id", "in": "path", "required": True, "schema": {"type": "integer"}}],
            "responses": {"200": _json({"type": "object", "required": ["file", "removed"],
                                        "properties": {"file": {"type": "integer"}, "removed": {"type": "integer"}}},
                                       "How many picks of the file were forgotten"),
                          **_errors("401", "403", "404", "429")}}},
    }


def openapi_document(version: str) -> dict:
    return {
        "openapi": "3.0.3",
        "info": {"title": "nearsight", "version": version,
                 "description": "Similarity and duplicate-group queries over one nearsight store. Writing "
                                "endpoints need the API key as a bearer token; beyond loopback every endpoint "
                                "but /healthz and /readyz does. Answers computed from the index carry the "
                                "generation's name (field `generation`, header X-Nearsight-Generation)."},
        "paths": _paths(),
        "components": {
            "schemas": SCHEMAS,
            "securitySchemes": {"bearer": {"type": "http", "scheme": "bearer"}},
            "responses": {f"E{code}": _json(_ref("Error"), text) for code, text in ERROR_STATUSES.items()},
        },
        "security": [{"bearer": []}, {}],
    }
