"""The JSON API: thin views over indexer (Searcher, Catalog, the served generation's groups).

Each view reads its arguments (params.py), asks indexer, and shapes the answer; no SQL here.
Answers that depend on the index carry the generation they came from, as the field
``generation`` and the header X-Nearsight-Generation. Groups are shown as a person's
verdicts leave them: a verdict acts on the next request.
"""

from __future__ import annotations

import io
import time

from flask import Blueprint, Response, jsonify, request, send_file

from nearsight.indexer import __version__
from nearsight.indexer.core.errors import ImageReadError, NotFoundError, UsageError
from nearsight.indexer.reading.images import read_image
from nearsight.indexer.calibration.calibration_report import questions
from nearsight.indexer.building.pipeline import store_status

from . import params
from .state import snapshot, state
from .openapi import openapi_document

api = Blueprint("api", __name__)

PREVIEW_QUALITY = 90
THUMB_MAX_AGE = 24 * 3600


# -- probes and description ------------------------------------------------------------------------
@api.get("/healthz")
def healthz():
    return jsonify(status="ok")


@api.get("/readyz")
def readyz():
    snap = snapshot(required=False)
    if snap is None:
        response = jsonify(status="not_ready", message="no generation is loaded yet")
        response.status_code = 503
        return response
    return jsonify(status="ready", generation=snap.name)


@api.get("/v1/openapi.json")
def openapi():
    return jsonify(openapi_document(__version__))


@api.get("/metrics")
def metrics():
    body, content_type = state().metrics.exposition()
    return Response(body, content_type=content_type)


@api.get("/v1/status")
def status():
    st = state()
    snap = snapshot(required=False)
    out = store_status(st.store(), with_questions=False)
    out["published_generation"] = (out.pop("generation") or {}).get("name")
    out["generation"] = None if snap is None else {
        "name": snap.name, "model": snap.model, "indexed": snap.size,
        "groups": len(snap.groups_now(st.store().catalog).groups),
        "index_spec": snap.generation.meta.get("index_spec"),
        "published_at": snap.generation.meta.get("published_at"), "loaded_at": snap.loaded_at,
    }
    out["thresholds"] = None if snap is None else snap.thresholds()
    out["calibration"] = None if snap is None else snap.calibration_summary()
    out["questions"] = None if snap is None else questions(snap.generation.calibration)
    out["service"] = {"version": __version__, "started_at": st.started_at, "swaps": st.live.swaps,
                      "load_failures": st.live.load_failures, "reads_need_key": st.config.reads_need_key,
                      "max_upload_bytes": st.config.max_upload_bytes,
                      "max_upload_pixels": st.config.max_upload_pixels}
    return jsonify(out)


# -- searching ------------------------------------------------------------------------------------
def _search_answer(snap, results, args, threshold, source, query) -> Response:
    return jsonify(generation=snap.name, model=snap.model, k=args["k"], threshold=threshold,
                   threshold_from=source, query=query, results=results)


@api.post("/v1/search")
def search():
    st = state()
    data, form = params.upload(request, st.config.max_upload_bytes)
    args = params.search_args({**form, **request.args})
    snap = snapshot()
    threshold, source = snap.threshold(args["threshold"], args["precision"])
    with st.decodes.place():  # at most max_decodes uploads decoded at once (service/guard.py)
        results, info = snap.searcher.similar_to_upload(
            data, args["k"], None if source == "generation" else threshold,
            max_pixels=min(st.config.max_upload_pixels, st.config.max_pixels), catalog=st.store().catalog)
    query = {"width": info.width, "height": info.height, "format": info.format, "bytes": len(data)}
    return _search_answer(snap, results, args, threshold, source, query)


@api.post("/v1/check")
def check():
    """New material against the archive (`nearsight check`): per uploaded image copy, similar, new or
    unreadable, with its best match; nothing is added to the store."""
    from nearsight.indexer.check import VERDICTS, check_uploads

    st = state()
    images, form = params.uploads(request, st.config.max_upload_bytes)
    args = params.search_args({**form, **request.args})
    snap = snapshot()
    threshold, source = snap.threshold(args["threshold"], args["precision"])
    with st.decodes.place():
        answers = check_uploads(snap.searcher, images, threshold=None if source == "generation" else threshold,
                                max_pixels=min(st.config.max_upload_pixels, st.config.max_pixels),
                                catalog=st.store().catalog)
        results = [a.to_dict() for a in answers]
    counts = {v: sum(r["verdict"] == v for r in results) for v in VERDICTS}
    return jsonify(generation=snap.name, model=snap.model, threshold=threshold, threshold_from=source,
                   counts=counts, results=results)


@api.get("/v1/images/<int:image_id>/similar")
def similar(image_id: int):
    params.check_id(image_id)
    args = params.search_args(request.args)
    snap = snapshot()
    threshold, source = snap.threshold(args["threshold"], args["precision"])
    results = snap.searcher.similar_to_id(image_id, args["k"], None if source == "generation" else threshold,
                                          catalog=state().store().catalog)
    return _search_answer(snap, results, args, threshold, source, {"id": image_id})


# -- images -----------------------------------------------------------------------------------------
def _image_row(image_id: int) -> dict:
    params.check_id(image_id)
    row = state().store().catalog.file(image_id)
    if row is None:
        raise NotFoundError(f"no image with id {image_id}")
    return row


@api.get("/v1/images/<int:image_id>")
def image(image_id: int):
    row = _image_row(image_id)
    snap = snapshot(required=False)
    gid_of = snap.groups_now(state().store().catalog).gid_of if snap else {}
    return jsonify(
        id=row["id"], path=_path(row), state=row["state"], reason=row["reason"], size=row["size"],
        mtime=row["mtime_ns"] / 1e9 if row["mtime_ns"] is not None else None,
        width=row["width"], height=row["height"], format=row["format"], content_hash=row["hash"],
        first_seen=row["first_seen"], last_seen=row["last_seen"],
        group=gid_of.get(image_id), generation=snap.name if snap else None,
    )


def _path(row: dict) -> str:
    from pathlib import Path

    return str(Path(row["root"]) / row["relpath"])


@api.get("/v1/images/<int:image_id>/thumbnail")
def thumbnail(image_id: int):
    """The small copy cached at scan time (by content hash); for an image without one, a copy
    made now from its catalogued file. Only catalogued ids: the path comes from the catalog."""
    row = _image_row(image_id)
    store = state().store()
    if row["hash"]:
        cached = store.thumb_path(row["hash"])
        if cached.is_file():
            response = send_file(cached, mimetype="image/jpeg", etag=row["hash"], max_age=THUMB_MAX_AGE,
                                 conditional=True, download_name=f"{image_id}.jpg")
            response.cache_control.public = False
            response.cache_control.private = True
            return response
    return _jpeg_of(row, max(store.settings.thumb_side, 64))


@api.get("/v1/images/<int:image_id>/preview")
def preview(image_id: int):
    """The image at up to `side` pixels on its longest side (default 1600), as JPEG, decoded from
    its catalogued file: what the review page shows when two images are compared."""
    side = params.int_arg(request.args, "side", 1600, 16, 4096)
    return _jpeg_of(_image_row(image_id), side)


def _jpeg_of(row: dict, side: int) -> Response:
    if row["state"] != "ok":
        raise NotFoundError(f"image {row['id']} has no pixels to show (state {row['state']})")
    try:
        im, _info = read_image(_path(row), max_side=side, max_pixels=state().config.max_pixels)
    except ImageReadError as exc:
        if exc.reason == "missing":
            raise NotFoundError(f"the file of image {row['id']} is no longer at {_path(row)}") from None
        raise
    buf = io.BytesIO()
    im.save(buf, format="JPEG", quality=PREVIEW_QUALITY)
    response = Response(buf.getvalue(), mimetype="image/jpeg")
    response.cache_control.private = True
    response.cache_control.max_age = 300
    return response


# -- groups -----------------------------------------------------------------------------------------
MEMBER_BRIEF = ("id", "tier", "similarity", "path", "width", "height", "file_size")


def _brief(group, rows: dict) -> dict:
    """A group for the list: its members with their file name and folder relative to their source (`rows`:
    the catalog's file rows)."""
    full = group.to_dict()
    members = []
    for m in full["members"]:
        relpath = (rows.get(m["id"]) or {}).get("relpath") or m["path"]
        members.append({**{k: m.get(k) for k in MEMBER_BRIEF}, "name": relpath.rsplit("/", 1)[-1],
                        "folder": relpath.rsplit("/", 1)[0] if "/" in relpath else "."})
    return {"gid": full["gid"], "tier": full["tier"], "size": full["size"], "keeper": full["keeper"],
            "reclaimable_bytes": full["reclaimable_bytes"], "best_similarity": group.best_similarity,
            "members": members}


@api.get("/v1/groups")
def groups():
    snap = snapshot()
    tier = request.args.get("tier") or None
    min_size = params.int_arg(request.args, "min_size", 2, 1, 10**9)
    max_size = params.int_arg(request.args, "max_size", None, 1, 10**9)
    limit = params.int_arg(request.args, "limit", 20, 1, 200)
    offset = params.int_arg(request.args, "offset", 0, 0, 10**9)
    catalog = state().store().catalog
    found = snap.groups_now(catalog).find(tier=tier, min_size=min_size, max_size=max_size)
    page = found[offset:offset + limit]
    rows = catalog.file_rows(m.id for g in page for m in g.members)
    return jsonify(generation=snap.name, total=len(found), offset=offset, limit=limit,
                   groups=[_brief(g, rows) for g in page])


@api.get("/v1/groups/<gid>")
def group(gid: str):
    snap = snapshot()
    catalog = state().store().catalog
    found = snap.groups_now(catalog).group(gid).to_dict()
    member_ids = [m["id"] for m in found["members"]]
    content_of = catalog.content_ids_of(member_ids)
    by_content: dict[int, list[int]] = {}
    for member in member_ids:
        if member in content_of:
            by_content.setdefault(content_of[member], []).append(member)
    verdicts = [
        {"a": a, "b": b, "verdict": v["verdict"], "origin": v["origin"], "created_at": v["created_at"], "id": v["id"]}
        for v in catalog.latest_verdicts_among(member_ids)
        for a in by_content.get(v["content_a"], []) for b in by_content.get(v["content_b"], [])
    ]
    return jsonify(generation=snap.name, **found, verdicts=verdicts, now=_explained(snap, catalog, gid))


def _explained(snap, catalog, gid: str) -> dict | None:
    """The group as a quarantine would see it now (indexer/acting/explain.py): the file to keep and why, each
    member's metadata, what would happen to it, and where it matches the keeper."""
    from nearsight.indexer.acting.explain import group_explainer

    explain = group_explainer(state().store(), snap.model, snap.searcher.whitening)
    facts = explain(snap.groups_now(catalog).group(gid))
    return None if facts is None else facts.to_dict()


# -- a person's choice of the file to keep ----------------------------------------------------------
@api.post("/v1/keepers")
def pick_keeper():
    """Keep this file in its group (indexer/acting/picks.py): it becomes the keeper of the plan, the keep list
    and the review page, before every other keeper rule. Body: {"file": id}. Needs the API key."""
    from nearsight.indexer.acting.picks import pick_keeper as pick

    file_id, author = params.keeper_body(params.json_body(request))
    response = jsonify(pick(state().store().catalog, file_id, author=author))
    response.status_code = 201
    return response


@api.delete("/v1/keepers/<int:image_id>")
def drop_keeper(image_id: int):
    """Forget a person's choice of this file: the keeper rules choose again. Needs the API key."""
    from nearsight.indexer.acting.picks import drop_picks

    return jsonify(file=image_id, removed=drop_picks(state().store().catalog, params.check_id(image_id)))


# -- the quarantine plan (read-only) ----------------------------------------------------------------
@api.get("/v1/plan")
def plan():
    """What `nearsight quarantine` would move now, from the published generation's groups as the latest
    verdicts leave them and the store's keeper rules, with the evidence for each file; nothing is moved or
    written (the CLI's --apply is the only way to act). Groups with a file to move or a near-duplicate left
    unverified are listed."""
    from nearsight.indexer.acting.plan import ACTION_TIERS, plan_quarantine

    tier = request.args.get("tier") or None
    if tier is not None and tier not in ACTION_TIERS:
        raise UsageError(f"tier must be one of {', '.join(ACTION_TIERS)}, not {tier!r}")
    include_unverified = params.bool_arg(request.args, "include_unverified")
    limit = params.int_arg(request.args, "limit", 20, 1, 200)
    offset = params.int_arg(request.args, "offset", 0, 0, 10**9)
    snapshot()  # 409 while no generation is served
    planned = plan_quarantine(state().store(), tier=tier, include_unverified=include_unverified).to_dict()
    listed = [g for g in planned["groups"] if g["moves"] or g["unverified"]]
    return jsonify(generation=planned["generation"], tier=planned["tier"],
                   include_unverified=planned["include_unverified"], rules=planned["rules"],
                   summary=planned["summary"], total=len(listed), offset=offset, limit=limit,
                   groups=listed[offset:offset + limit])


# -- the pairs to judge first -----------------------------------------------------------------------
@api.get("/v1/review/pairs")
def review_pairs():
    """The pairs whose verdict would tell most about the duplicate threshold, best first
    (indexer/calibration/review_queue.py); a judged pair leaves the queue with the next request."""
    limit = params.int_arg(request.args, "limit", 20, 1, 200)
    offset = params.int_arg(request.args, "offset", 0, 0, 10**9)
    snap = snapshot()
    queue = snap.review_queue(state().store().catalog)
    return jsonify(generation=snap.name, threshold=queue.threshold, probability_from=queue.source,
                   left_out=queue.left_out, total=len(queue.pairs), offset=offset, limit=limit,
                   pairs=[p.to_dict() for p in queue.pairs[offset:offset + limit]])


# -- verdicts ---------------------------------------------------------------------------------------
VERDICT_FIELDS = ("id", "file_a", "file_b", "verdict", "origin", "author", "note", "created_at")
MAX_UNDO = 1000  # verdicts taken back in one request (a group's bulk verdict)


@api.get("/v1/verdicts")
def list_verdicts():
    limit = params.int_arg(request.args, "limit", 100, 1, 1000)
    offset = params.int_arg(request.args, "offset", 0, 0, 10**9)
    latest = state().store().catalog.latest_verdicts()[::-1]
    return jsonify(total=len(latest), offset=offset, limit=limit,
                   verdicts=[{k: v.get(k) for k in VERDICT_FIELDS} for v in latest[offset:offset + limit]])


@api.delete("/v1/verdicts")
def remove_verdicts():
    """Take back verdicts by id (`ids=1,2,3`): the review page's undo of what it just stored. The verdicts
    before them on the same pairs count again, at the next read. Needs the API key."""
    ids = params.id_list(request.args, "ids", MAX_UNDO)
    removed = state().store().catalog.remove_verdicts(ids)
    return jsonify(removed=removed, asked=len(ids))


@api.post("/v1/verdicts")
def add_verdicts():
    pairs, origin, author = params.verdicts_body(params.json_body(request))
    ids = state().store().catalog.add_verdicts(pairs, origin=origin, author=author)
    stored = [{"id": i, "file_a": p["file_a"], "file_b": p["file_b"], "verdict": p["verdict"]}
              for i, p in zip(ids, pairs)]
    response = jsonify(stored=len(ids), verdicts=stored, at=time.time())
    response.status_code = 201
    return response
