"""The HTTP service as other systems meet it: a real `python -m nearsight serve` process on
127.0.0.1, real HTTP requests (the standard library's http.client), answers checked against
the catalog and the published generation read directly, against Pillow, and against the
HTTP and Prometheus standards named beside each check.
"""

import http.client
import io
import json
import socket
from pathlib import Path

import pytest
from PIL import Image
from prometheus_client.parser import text_string_to_metric_families

from nearsight.indexer.matching import generations
from nearsight.indexer.storage.catalog import Catalog
from nearsight.indexer.core.settings import load_settings
from nearsight.indexer.storage.store import Store
from nearsight.indexer.matching.rerank import verdict_score

from .service_support import API_KEY, COPIED, Response, multipart, multipart_files, transformed


@pytest.fixture(scope="module")
def client(live_server):
    c = live_server.client()
    yield c
    c.close()


@pytest.fixture(scope="module")
def writer(live_server):
    c = live_server.client(API_KEY)
    yield c
    c.close()


@pytest.fixture(scope="module")
def served(live_server):
    """The served store read directly: its generation, groups and a catalog connection."""
    with Store.open(live_server.store, settings=load_settings(environ={})) as store:
        gen = generations.current(store)
        yield {"store": store, "gen": gen, "groups": gen.load_groups()["groups"]}


def _ids_by_path(served) -> dict[str, int]:
    return {m["path"]: i for i, m in served["store"].catalog.image_meta().items()}


def _assert_error(response, status, code=None):
    """Every error is a JSON object with an error code and a human message, never a traceback."""
    assert response.status == status, response.body[:300]
    assert response.headers["content-type"].startswith("application/json")
    body = response.json()
    assert set(body) >= {"error", "message"} and body["message"]
    assert "Traceback" not in response.body.decode("utf-8", "replace")
    if code:
        assert body["error"] == code
    return body


# -- probes, status, description -------------------------------------------------------------------
def test_health_readiness_and_status_describe_the_served_generation(client, served):
    assert client.get("/healthz").json() == {"status": "ok"}
    ready = client.get("/readyz")
    assert ready.status == 200 and ready.json()["generation"] == served["gen"].name

    status = client.get("/v1/status")
    assert status.status == 200
    body = status.json()
    counts = served["store"].catalog.counts()
    for key in ("files", "ok", "unreadable", "removed", "distinct_contents"):
        assert body[key] == counts[key], key
    assert body["generation"]["name"] == served["gen"].name == body["published_generation"]
    assert body["generation"]["model"] == served["gen"].meta["model"] == body["model"]
    assert body["generation"]["indexed"] == served["gen"].meta["indexed"]
    assert body["thresholds"]["near"] == served["gen"].threshold("near")
    calibration = served["gen"].load_calibration()
    assert body["calibration"] == (calibration.get("summary") if calibration else None)
    assert status.headers["x-nearsight-generation"] == served["gen"].name


def test_openapi_document_lists_exactly_the_served_routes(client):
    """OpenAPI 3 (spec.openapis.org/oas/v3.0.3): one path item per route, the methods the route answers."""
    from nearsight.service import create_app

    doc = client.get("/v1/openapi.json").json()
    assert doc["openapi"].startswith("3.0")
    documented = {(path, method.upper()) for path, item in doc["paths"].items() for method in item}
    # The application's own routing table (Flask's url_map), in OpenAPI's {name} syntax.
    app = create_app({"store": client_store(client), "watch": False})
    routed = set()
    for rule in app.url_map.iter_rules():
        if rule.endpoint in ("static", "review.page"):
            continue
        path = rule.rule.replace("<int:", "{").replace("<", "{").replace(">", "}")
        routed |= {(path, m) for m in rule.methods - {"HEAD", "OPTIONS"}}
    assert documented == routed


def client_store(client):
    return client.get("/v1/status").json()["store"]


# -- search by upload ------------------------------------------------------------------------------------
def test_search_by_upload_finds_the_original_of_a_transformed_photo(client, service_store, served, tmp_path):
    """scikit-image's photos, each shrunk to 70% and re-saved as JPEG quality 60 with Pillow:
    the photo it came from is the first answer (photos with planted copies are left out: a copy
    may rightly rank level with the original)."""
    ids = _ids_by_path(served)
    misses = []
    names = [n for n in service_store.originals if n not in COPIED]
    for name in names:
        data = transformed(service_store.originals[name], tmp_path / f"{name}.jpg").read_bytes()
        r = client.post_image("/v1/search?k=5", data)
        assert r.status == 200, r.body
        body = r.json()
        assert body["generation"] == served["gen"].name == r.headers["x-nearsight-generation"]
        assert body["query"]["format"] == "JPEG" and body["query"]["bytes"] == len(data)
        top = body["results"][0]
        if top["id"] != ids[str(service_store.originals[name])]:
            misses.append((name, top["path"]))
        assert top["path"] == served["store"].catalog.paths_for([top["id"]])[top["id"]]
        sims = [x["similarity"] for x in body["results"]]
        assert sims == sorted(sims, reverse=True)
        assert all(x["duplicate"] == (verdict_score(x) >= body["threshold"]) for x in body["results"])
    assert not misses, misses
    assert len(names) == 13


def test_raw_body_and_multipart_upload_give_the_same_answer(client, service_store, tmp_path):
    """multipart/form-data as RFC 7578 frames it; the file name is ignored, never opened."""
    data = transformed(service_store.originals["rocket"], tmp_path / "q.jpg").read_bytes()
    raw = client.post_image("/v1/search?k=4&threshold=0.25", data).json()
    body, ctype = multipart("image", "/etc/passwd", data, fields={"k": "4", "threshold": "0.25"})
    form = client.request("POST", "/v1/search", body, {"Content-Type": ctype}).json()
    assert form["results"] == raw["results"] and form["threshold"] == raw["threshold"] == 0.25
    assert form["threshold_from"] == "request" and len(form["results"]) == 4
    octet = client.post_image("/v1/search?k=4&threshold=0.25", data, "application/octet-stream").json()
    assert octet["results"] == raw["results"]


def test_precision_uses_the_generations_calibrated_threshold_or_says_why_not(client, served, service_store, tmp_path):
    data = transformed(service_store.originals["moon"], tmp_path / "q.jpg").read_bytes()
    r = client.post_image("/v1/search?precision=0.9", data)
    if served["gen"].load_calibration() is None:
        body = _assert_error(r, 409, "not_ready")     # Generation.threshold raises NotReadyError
        assert "calibrat" in body["message"]
    else:
        assert r.json()["threshold"] == served["gen"].threshold("near", 0.9)
    _assert_error(client.post_image("/v1/search?precision=0.9&threshold=0.5", data), 400, "bad_request")


# -- ids, groups, verdicts round-trip ---------------------------------------------------------------------
def test_image_ids_round_trip_with_the_catalog(client, served):
    ids = _ids_by_path(served)
    some = sorted(ids.values())[:5]
    for image_id in some:
        row = served["store"].catalog.file(image_id)
        body = client.get(f"/v1/images/{image_id}").json()
        assert body["id"] == image_id and body["content_hash"] == row["hash"]
        assert body["path"] == served["store"].catalog.paths_for([image_id])[image_id]
        assert (body["width"], body["height"], body["state"]) == (row["width"], row["height"], "ok")
        similar = client.get(f"/v1/images/{image_id}/similar?k=3").json()
        assert image_id not in [x["id"] for x in similar["results"]] and len(similar["results"]) == 3
        for x in similar["results"]:
            assert client.get(f"/v1/images/{x['id']}").json()["path"] == x["path"]


def test_similar_by_id_matches_a_search_with_the_stored_vector(client, served):
    """The same neighbours as FAISS gives in-process for the stored (whitened) vector."""
    from nearsight.indexer.matching.query import Searcher

    image_id = sorted(_ids_by_path(served).values())[7]
    searcher = Searcher(served["store"])
    expected = searcher.similar_to_id(image_id, 5)
    got = client.get(f"/v1/images/{image_id}/similar?k=5").json()["results"]
    assert [x["id"] for x in got] == [x["id"] for x in expected]
    assert [x["similarity"] for x in got] == pytest.approx([x["similarity"] for x in expected], abs=1e-6)


def test_thumbnail_is_the_cached_small_copy_of_that_image(client, served):
    image_id = sorted(_ids_by_path(served).values())[3]
    row = served["store"].catalog.file(image_id)
    r = client.get(f"/v1/images/{image_id}/thumbnail")
    assert r.status == 200 and r.headers["content-type"] == "image/jpeg"
    assert r.body == served["store"].thumb_path(row["hash"]).read_bytes()
    assert Image.open(io.BytesIO(r.body)).format == "JPEG"
    # RFC 9110 §13.1.2: If-None-Match with the current entity tag answers 304 without a body.
    again = client.get(f"/v1/images/{image_id}/thumbnail", headers={"If-None-Match": r.headers["etag"]})
    assert again.status == 304 and again.body == b""


def test_preview_is_the_catalogued_file_at_the_asked_size(client, service_store, served):
    ids = _ids_by_path(served)
    path = service_store.originals["astronaut"]
    r = client.get(f"/v1/images/{ids[str(path)]}/preview?side=100")
    im = Image.open(io.BytesIO(r.body))
    original = Image.open(path)
    assert im.format == "JPEG" and max(im.size) == 100
    assert im.size == (100, round(100 * original.height / original.width))


def test_groups_page_through_the_generations_groups_and_filter(client, served):
    groups = served["groups"]
    assert groups, "the test archive plants copies, so there are groups"
    seen, offset = [], 0
    while True:
        page = client.get(f"/v1/groups?limit=7&offset={offset}").json()
        assert page["total"] == len(groups) and page["generation"] == served["gen"].name
        if not page["groups"]:
            break
        seen += page["groups"]
        offset += 7
    assert [g["gid"] for g in seen] == [g["gid"] for g in groups]
    assert [[m["id"] for m in g["members"]] for g in seen] == [[m["id"] for m in g["members"]] for g in groups]

    for tier in ("near-duplicate", "similar", "same-pixels"):
        got = client.get(f"/v1/groups?tier={tier}&min_size=3&limit=200").json()
        want = [g["gid"] for g in groups if g["tier"] == tier and g["size"] >= 3]
        assert [g["gid"] for g in got["groups"]] == want and got["total"] == len(want)
    small = client.get("/v1/groups?max_size=2&limit=200").json()
    assert [g["gid"] for g in small["groups"]] == [g["gid"] for g in groups if g["size"] <= 2]
    # Each member by its file name and its folder relative to its source, as the catalog has them.
    rows = served["store"].catalog.file_rows(m["id"] for g in seen for m in g["members"])
    for m in (m for g in seen for m in g["members"]):
        relpath = rows[m["id"]]["relpath"]
        assert (m["folder"], m["name"]) == (str(Path(relpath).parent), Path(relpath).name)

    one = groups[0]
    detail = client.get(f"/v1/groups/{one['gid']}").json()
    assert {k: detail[k] for k in one} == one
    _assert_error(client.get("/v1/groups?tier=purple"), 400, "bad_request")
    _assert_error(client.get("/v1/groups/0000000000000000"), 404, "not_found")


def test_plan_is_the_quarantine_dry_run_and_moves_nothing(client, served):
    """GET /v1/plan equals indexer's plan_quarantine on the same store, and no file changes
    (every file hashed with hashlib before and after)."""
    import hashlib
    from pathlib import Path

    from nearsight.indexer.acting.quarantine import plan_quarantine

    paths = [m["path"] for m in served["store"].catalog.image_meta().values()]
    before = {p: hashlib.sha256(Path(p).read_bytes()).hexdigest() for p in paths}
    page = client.get("/v1/plan?limit=200").json()
    want = plan_quarantine(served["store"]).to_dict()
    assert page["summary"] == want["summary"] and page["generation"] == want["generation"]
    assert [g["gid"] for g in page["groups"]] == [g["gid"] for g in want["groups"] if g["moves"] or g["unverified"]]
    assert page["include_unverified"] is False and all(m["evidence"] != "unverified (opted in)"
                                                       for g in page["groups"] for m in g["moves"])
    assert page["summary"]["files"] == sum(len(g["moves"]) for g in page["groups"])
    assert {p: hashlib.sha256(Path(p).read_bytes()).hexdigest() for p in paths} == before
    narrow = client.get("/v1/plan?tier=same-bytes&limit=200").json()
    assert all(m["tier"] == "same-bytes" for g in narrow["groups"] for m in g["moves"])
    _assert_error(client.get("/v1/plan?tier=similar"), 400, "bad_request")
    _assert_error(client.get("/v1/plan?include_unverified=perhaps"), 400, "bad_request")


def _judgeable_pair(served):
    """Keeper and a member of a group whose contents differ (a verdict needs two contents)."""
    for g in served["groups"]:
        keeper = next(m for m in g["members"] if m["id"] == g["keeper"])
        for m in g["members"]:
            if m["content_hash"] != keeper["content_hash"]:
                return g, keeper["id"], m["id"]
    raise AssertionError("no group with two contents")


def test_verdicts_need_the_key_and_round_trip_through_the_catalog(client, writer, served):
    group, a, b = _judgeable_pair(served)
    verdict = {"file_a": a, "file_b": b, "verdict": "different", "note": "api test"}
    # RFC 6750 §3: a missing or wrong bearer token is 401 with a WWW-Authenticate: Bearer challenge.
    for headers in ({}, {"Authorization": "Bearer wrong-key-wrong-key"}, {"Authorization": f"Basic {API_KEY}"}):
        r = client.request("POST", "/v1/verdicts", json.dumps(verdict).encode(),
                           {"Content-Type": "application/json", **headers})
        _assert_error(r, 401, "unauthorized")
        assert r.headers["www-authenticate"].startswith("Bearer")

    r = writer.post_json("/v1/verdicts", verdict)
    assert r.status == 201, r.body
    stored_id = r.json()["verdicts"][0]["id"]
    with Catalog(served["store"].root / "catalog.sqlite") as catalog:
        latest = {v["id"]: v for v in catalog.latest_verdicts()}
    assert latest[stored_id]["verdict"] == "different" and latest[stored_id]["origin"] == "api"
    assert {latest[stored_id]["file_a"], latest[stored_id]["file_b"]} == {a, b}

    listed = client.get("/v1/verdicts?limit=1000").json()
    assert stored_id in [v["id"] for v in listed["verdicts"]]
    # The verdict acts at once: the group that held the pair is split, so its gid is gone.
    _assert_error(client.get(f"/v1/groups/{group['gid']}"), 404, "not_found")
    page = client.get("/v1/groups?limit=200").json()["groups"]
    assert not any({a, b} <= {m["id"] for m in g["members"]} for g in page)

    # A later verdict on the same pair is the one that counts: "same" brings the published group back.
    writer.post_json("/v1/verdicts", {"verdicts": [{"file_a": b, "file_b": a, "verdict": "same"}], "author": "t"})
    with Catalog(served["store"].root / "catalog.sqlite") as catalog:
        pair = [v for v in catalog.latest_verdicts() if {v["file_a"], v["file_b"]} == {a, b}]
    assert [v["verdict"] for v in pair] == ["same"]
    detail = client.get(f"/v1/groups/{group['gid']}").json()
    assert [m["id"] for m in detail["members"]] == [m["id"] for m in group["members"]]
    assert [v["verdict"] for v in detail["verdicts"] if {v["a"], v["b"]} == {a, b}] == ["same"]


@pytest.mark.parametrize("body, status", [
    ({"file_a": 1, "file_b": 1, "verdict": "same"}, 400),           # one file with itself
    ({"file_a": 1, "file_b": 2, "verdict": "maybe"}, 400),
    ({"file_a": "1", "file_b": 2, "verdict": "same"}, 400),
    ({"file_a": 1, "file_b": 2, "verdict": "same", "colour": "red"}, 400),
    ({"file_a": 1, "file_b": 99999999, "verdict": "same"}, 404),
    ({"file_a": 1, "file_b": 2**70, "verdict": "same"}, 400),
    ({"verdicts": []}, 400),
    ([1, 2, 3], 400),
])
def test_bad_verdicts_are_refused_with_a_reason(writer, body, status):
    _assert_error(writer.post_json("/v1/verdicts", body), status)


# -- safety -----------------------------------------------------------------------------------------------
def test_bodies_that_are_not_images_are_refused_with_json(client, writer):
    # RFC 9110 §15.5.16: 415 for a media type the endpoint does not take.
    _assert_error(client.request("POST", "/v1/search", b"hello", {"Content-Type": "text/plain"}), 415)
    _assert_error(client.request("POST", "/v1/search", b'{"a": 1}', {"Content-Type": "application/json"}), 415)
    body = _assert_error(client.post_image("/v1/search", b"GIF89a but not really"), 422, "unreadable_image")
    assert body["reason"] in ("not-image", "truncated", "corrupt")
    # A JPEG cut short (an interrupted upload): said in plain words, not in the decoder's.
    whole = io.BytesIO()
    Image.effect_noise((320, 240), 60).convert("RGB").save(whole, "JPEG", quality=90)
    cut = _assert_error(client.post_image("/v1/search", whole.getvalue()[: len(whole.getvalue()) // 2]), 422,
                        "unreadable_image")
    assert cut["reason"] == "truncated" and "ends before the image does" in cut["message"]
    assert "bytes not processed" not in cut["message"]
    _assert_error(client.post_image("/v1/search", b""), 400)
    _assert_error(writer.request("POST", "/v1/verdicts", b"file_a=1", {"Content-Type": "text/plain"}), 415)
    _assert_error(writer.request("POST", "/v1/verdicts", b"{not json", {"Content-Type": "application/json"}), 400)


# -- checking new material -------------------------------------------------------------------------------
def test_check_answers_each_upload_as_the_command_does(client, service_store, run_cli, tmp_path):
    """POST /v1/check with four files (a byte copy of an archived photo, a 70 % JPEG of another, a noise
    image the archive cannot hold, a broken file) against `nearsight check --json` on the same files and an
    equal store: the same verdicts and matches. The byte copy is found by content hash (hashlib's BLAKE2b of
    the bytes, as the catalog records it) without decoding."""
    import hashlib

    original = service_store.originals["astronaut"]
    files = {"astronaut.jpg": original.read_bytes(),
             "rocket-small.jpg": transformed(service_store.originals["rocket"], tmp_path / "r.jpg").read_bytes(),
             "broken.jpg": b"\xff\xd8\xff\xe0 not really a JPEG"}
    noise = io.BytesIO()
    Image.effect_noise((300, 200), 80).convert("RGB").save(noise, "PNG")
    files["noise.png"] = noise.getvalue()
    body, ctype = multipart_files([(f"f{i}", name, data, "application/octet-stream")
                                   for i, (name, data) in enumerate(files.items())])
    r = client.request("POST", "/v1/check", body, {"Content-Type": ctype})
    assert r.status == 200, r.body
    answer = r.json()
    by_name = {a["path"]: a for a in answer["results"]}
    assert [a["path"] for a in answer["results"]] == list(files)
    same = by_name["astronaut.jpg"]
    assert same["verdict"] == "copy" and same["match"]["evidence"] == {"same_bytes": True}
    assert same["match"]["path"] == str(original)
    assert by_name["broken.jpg"]["verdict"] == "unreadable" and by_name["broken.jpg"]["error"]["reason"]
    assert sum(answer["counts"].values()) == 4 and answer["threshold_from"] == "generation"
    # The command line on the same bytes (saved under the same names) and a copy of the same store.
    for name, data in files.items():
        (tmp_path / name).write_bytes(data)
    store = service_store.copy("check-cli")
    cli = run_cli("check", *[tmp_path / n for n in files], "--store", store, "--json")
    expected = {json.loads(line)["path"].rsplit("/", 1)[1]: json.loads(line) for line in cli.stdout.splitlines()}
    for name in files:
        assert by_name[name]["verdict"] == expected[name]["verdict"], name
        assert by_name[name]["match"] == expected[name]["match"], name
    digest = hashlib.blake2b(original.read_bytes(), digest_size=32).hexdigest()
    assert _catalog_hash(store, same["match"]["id"]) == digest


def _catalog_hash(store_dir, file_id):
    with Catalog(store_dir / "catalog.sqlite") as catalog:
        return catalog.file_rows([file_id])[file_id]["hash"]


def test_check_refuses_what_is_not_a_batch_of_images(client):
    _assert_error(client.request("POST", "/v1/check", b"hello", {"Content-Type": "text/plain"}), 415)
    body, ctype = multipart_files([], fields={"threshold": "0.5"})
    _assert_error(client.request("POST", "/v1/check", body, {"Content-Type": ctype}), 400)
    body, ctype = multipart_files([(f"f{i}", f"{i}.jpg", b"x", "image/jpeg") for i in range(65)])
    assert "at most 64" in _assert_error(client.request("POST", "/v1/check", body, {"Content-Type": ctype}), 400)["message"]
    _assert_error(client.post_image("/v1/check?threshold=2", b"x"), 400)


def test_uploads_over_the_size_or_pixel_limit_are_refused(client, live_server):
    # This server was started with NEARSIGHT_MAX_UPLOAD_BYTES=2 MiB and NEARSIGHT_MAX_UPLOAD_PIXELS=20M.
    # RFC 9110 §15.5.14: 413 Content Too Large, from Flask just over the limit ...
    body = _assert_error(client.post_image("/v1/search", b"\xff" * (2 * 1024 * 1024 + 100)), 413, "payload_too_large")
    assert "max_upload_bytes" in body["message"]
    # ... and from waitress, as JSON too, when the declared length is far over: refused from the
    # headers alone, before any of the body is read (so none is sent here).
    with socket.create_connection((live_server.host, live_server.port), timeout=30) as sock:
        sock.sendall(b"POST /v1/search HTTP/1.1\r\nHost: test\r\nContent-Type: image/jpeg\r\n"
                     b"Content-Length: 100000000\r\n\r\n")
        raw = http.client.HTTPResponse(sock)
        raw.begin()
        r = Response(raw.status, {k.lower(): v for k, v in raw.getheaders()}, raw.read())
    _assert_error(r, 413)
    # A small PNG whose header claims 25 megapixels: refused from the header, never decoded.
    buf = io.BytesIO()
    Image.new("L", (5000, 5000)).save(buf, format="PNG")
    assert len(buf.getvalue()) < 2 * 1024 * 1024
    body = _assert_error(client.post_image("/v1/search", buf.getvalue(), "image/png"), 422, "unreadable_image")
    assert body["reason"] == "too-large"


@pytest.mark.parametrize("path, status", [
    ("/v1/images/999999", 404),
    ("/v1/images/999999/thumbnail", 404),
    ("/v1/images/999999/similar", 404),
    ("/v1/images/0", 404),
    (f"/v1/images/{2**70}", 404),
    ("/v1/images/..%2F..%2Fetc%2Fpasswd", 404),
    ("/v1/images/%2Fetc%2Fpasswd/thumbnail", 404),
    ("/static/..%2F..%2Fapp.py", 404),
    ("/v1/images/1/similar?k=0", 400),
    ("/v1/images/1/similar?k=nan", 400),
    ("/v1/images/1/similar?threshold=2", 400),
    ("/v1/images/1/preview?side=99999", 400),
    ("/v1/nothing", 404),
])
def test_bad_paths_and_parameters_get_json_errors(client, path, status):
    _assert_error(client.get(path), status)


def test_no_route_takes_a_filesystem_path(client):
    """Images are named by catalog id only: no documented parameter or form field is a path."""
    doc = client.get("/v1/openapi.json").json()
    names = {p["name"] for item in doc["paths"].values() for op in item.values() for p in op.get("parameters", [])}
    assert not names & {"path", "file", "filename", "src", "url"}


def test_cors_is_off_unless_configured(client):
    r = client.get("/v1/status", headers={"Origin": "https://elsewhere.example"})
    assert "access-control-allow-origin" not in r.headers


def test_metrics_count_requests_and_describe_the_index(client, served):
    client.get("/healthz")
    text = client.get("/metrics").body.decode()
    # Parsed with prometheus_client's own parser of the text exposition format.
    families = {f.name: f for f in text_string_to_metric_families(text)}
    requests = families["nearsight_http_requests"]
    assert any(s.labels.get("route") == "/healthz" and s.labels["status"] == "200" and s.value >= 1
               for s in requests.samples)
    assert families["nearsight_index_vectors"].samples[0].value == served["gen"].meta["indexed"]
    info = families["nearsight_generation_info"].samples[0]
    assert info.labels["generation"] == served["gen"].name and info.value == 1
    assert any(s.name == "nearsight_http_request_duration_seconds_count" for s in
               families["nearsight_http_request_duration_seconds"].samples)


def test_request_log_has_a_line_per_request_and_no_image_bytes(client, live_server, service_store, tmp_path):
    data = transformed(service_store.originals["clock"], tmp_path / "q.jpg").read_bytes()
    client.post_image("/v1/search?k=2", data)
    log = live_server.log()
    assert "POST /v1/search 200" in log
    lines = [line for line in log.splitlines() if "POST /v1/search 200" in line]
    assert all(len(line) < 300 for line in lines)
    assert data[:64].decode("latin-1") not in log and "JFIF" not in log and API_KEY not in log


# The one rule for a threshold, a precision and k (indexer/core/limits.py), wherever they are given.
OUT_OF_RANGE = [("threshold", "2", "a number in (0, 1]"), ("threshold", "-0.5", "a number in (0, 1]"),
                ("threshold", "0", "a number in (0, 1]"), ("precision", "1", "a number in (0, 1)"),
                ("precision", "0", "a number in (0, 1)"), ("k", "0", "a whole number from 1 to 100"),
                ("k", "101", "a whole number from 1 to 100"), ("k", "2.5", "a whole number from 1 to 100")]
ENTRY_POINTS = {  # where each value goes in: (command line | HTTP request) for a name and a value
    "similar": lambda name, v, tmp: ["similar", str(tmp), f"--{name}" if name != "k" else "-k", v],
    "groups": lambda name, v, tmp: ["groups", f"--{name}", v],
    "quarantine": lambda name, v, tmp: ["quarantine", "--to", str(tmp / "q"), f"--{name}", v],
    "GET /v1/images/1/similar": lambda name, v, tmp: f"/v1/images/1/similar?{name}={v}",
    "POST /v1/search": lambda name, v, tmp: f"/v1/search?{name}={v}",
}


@pytest.mark.parametrize("entry, name, value, stated", [
    (entry, *case) for entry in ENTRY_POINTS for case in OUT_OF_RANGE
    if not (case[0] == "k" and entry in ("groups", "quarantine"))])  # neither takes a k
def test_every_command_and_endpoint_refuses_an_out_of_range_number_with_the_same_range(
        entry, name, value, stated, client, capsys, tmp_path):
    from nearsight.indexer.cli import main

    request = ENTRY_POINTS[entry](name, value, tmp_path)
    expected = f"{name} must be {stated}, not '{value}'"
    if entry.startswith(("GET", "POST")):
        data = io.BytesIO()
        Image.new("RGB", (64, 48), (120, 30, 200)).save(data, "PNG")
        response = client.get(request) if entry.startswith("GET") else client.post_image(request, data.getvalue())
        assert _assert_error(response, 400, "bad_request")["message"] == expected
    else:
        with pytest.raises(SystemExit) as stopped:  # refused while the arguments are read: no store is opened
            main(["--store", str(tmp_path / "no-store"), *request])
        assert stopped.value.code == 2
        option = "-k" if name == "k" else f"--{name}"
        assert f"argument {option}: {expected}" in capsys.readouterr().err
        assert not (tmp_path / "no-store").exists()


def test_a_foreign_host_is_refused_on_every_route_and_loopback_names_are_served(client):
    """DNS rebinding: a page whose name now points at 127.0.0.1 sends its own name as Host. Every route (each
    documented path with its ids filled in, the review page, a static file, the health probes) answers it with
    421 in the JSON error shape (RFC 9110 §15.5.20), while the loopback names, with a port, are served."""
    doc = client.get("/v1/openapi.json").json()
    routes = [(method.upper(), path.replace("{image_id}", "1").replace("{gid}", "1"))
              for path, operations in doc["paths"].items() for method in operations]
    routes += [("GET", "/"), ("GET", "/static/review.js"), ("GET", "/healthz")]
    assert len(routes) > 10
    for method, path in routes:
        _assert_error(client.request(method, path, b"", {"Host": "evil.example"}), 421, "misdirected_request")
        _assert_error(client.request(method, path, b"", {"Host": f"evil.example:{client.port}"}), 421)
    for host in ("localhost", "127.0.0.1", "[::1]"):
        answered = client.request("GET", "/v1/status", None, {"Host": f"{host}:{client.port}"})
        assert answered.status == 200, (host, answered.body[:200])
