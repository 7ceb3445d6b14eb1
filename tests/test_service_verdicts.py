"""A person's verdict acts at once: a real `python -m nearsight serve` on 127.0.0.1
(tests/service_support.py), real HTTP requests (the standard library's http.client), the
store's catalog and published generation read directly, and files checked by hashlib's
SHA-256 (FIPS 180-4) after a real quarantine with apply on the same store.
"""

import hashlib
from pathlib import Path

import pytest
from PIL import Image

from nearsight.indexer.matching import generations
from nearsight.indexer.acting.quarantine import apply_quarantine
from nearsight.indexer.core.settings import load_settings
from nearsight.indexer.storage.store import Store

from .service_support import API_KEY, ServerProcess, resized_copy_group


@pytest.fixture
def server(service_store):
    """A server of its own on a copy of the store and of its archive: the verdicts a test posts, and
    the files its quarantine moves, reach no other test."""
    process = ServerProcess(service_store.copy_with_archive("verdicts")).start()
    yield process
    process.stop()


def _published(store_dir: Path) -> tuple[list[dict], dict[int, dict]]:
    with Store.open(store_dir, settings=load_settings(environ={})) as store:
        return generations.current(store).load_groups()["groups"], store.catalog.image_meta()


def _sha256(path) -> str:
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


def _together(groups: list[dict], a: int, b: int) -> list[dict]:
    return [g for g in groups if {a, b} <= {m["id"] for m in g["members"]}]


def _plan_ids(group: dict) -> set[int]:
    return {group["keeper"]["id"]} | {f["id"] for part in ("moves", "kept", "unverified", "skipped")
                                      for f in group[part]}


def test_different_splits_the_pair_in_groups_and_plan_and_quarantine_leaves_both(server, tmp_path):
    published, _ = _published(server.store)
    # A copy with the same pixels as its keeper: without a verdict it is moved, whatever the encoder learned.
    group = next(g for g in published if any(m["tier"] == "same-pixels" for m in g["members"]))
    a = group["keeper"]
    b = next(m["id"] for m in group["members"] if m["tier"] == "same-pixels")
    client, writer = server.client(), server.client(API_KEY)
    before = client.get("/v1/plan?limit=200").json()
    assert any(m["id"] in (a, b) and m["copy_of"]["id"] in (a, b) for g in before["groups"] for m in g["moves"])

    r = writer.post_json("/v1/verdicts", {"verdicts": [{"file_a": b, "file_b": a, "verdict": "different"}],
                                          "origin": "review"})
    assert r.status == 201, r.body

    groups = client.get("/v1/groups?limit=200").json()
    assert groups["total"] == len(groups["groups"]) and not _together(groups["groups"], a, b)
    plan = client.get("/v1/plan?limit=200").json()
    assert not any({a, b} <= _plan_ids(g) for g in plan["groups"])
    images = {i: client.get(f"/v1/images/{i}").json() for i in (a, b)}
    assert images[a]["group"] is None or images[a]["group"] != images[b]["group"]

    paths = {i: images[i]["path"] for i in (a, b)}
    hashes = {i: _sha256(p) for i, p in paths.items()}
    with Store.open(server.store, settings=load_settings(environ={})) as store:
        result = apply_quarantine(store, tmp_path / "quarantine")
    assert result["moved"] and not {a, b} & {m["id"] for m in result["moved_files"]}
    assert {i: _sha256(p) for i, p in paths.items()} == hashes  # both still in place, bytes unchanged
    client.close()
    writer.close()


def test_same_joins_two_ungrouped_files_at_once_and_the_plan_moves_one_on_that_evidence(server):
    published, meta = _published(server.store)
    grouped = {m["id"] for g in published for m in g["members"]}
    # Two tiles of different photos that no group holds.
    x, y = [i for i, m in sorted(meta.items()) if i not in grouped and "_t11" in m["path"]][:2]
    client, writer = server.client(), server.client(API_KEY)
    assert writer.post_json("/v1/verdicts", {"file_a": x, "file_b": y, "verdict": "same"}).status == 201

    groups = client.get("/v1/groups?limit=200").json()["groups"]
    (group,) = _together(groups, x, y)
    assert group["tier"] == "person-same" and group["size"] == 2
    joined = next(m for m in group["members"] if m["id"] != group["keeper"])
    assert joined["tier"] == "person-same"
    assert client.get(f"/v1/images/{x}").json()["group"] == group["gid"]
    detail = client.get(f"/v1/groups/{group['gid']}").json()
    assert [(v["verdict"], {v["a"], v["b"]}) for v in detail["verdicts"]] == [("same", {x, y})]

    plan = client.get("/v1/plan?limit=200").json()
    (planned,) = [g for g in plan["groups"] if g["gid"] == group["gid"]]
    assert [(m["id"], m["evidence"]) for m in planned["moves"]] == [(joined["id"], "person-same")]
    client.close()
    writer.close()


def _iou(a, b):
    """Intersection over union of two (x0, y0, x1, y1) boxes, as the PASCAL VOC detection measure defines it."""
    ix = max(0.0, min(a[2], b[2]) - max(a[0], b[0]))
    iy = max(0.0, min(a[3], b[3]) - max(a[1], b[1]))
    inter = ix * iy
    return inter / ((a[2] - a[0]) * (a[3] - a[1]) + (b[2] - b[0]) * (b[3] - b[1]) - inter)


def test_a_keeper_chosen_on_the_review_page_reaches_the_plan_and_can_be_taken_back(server):
    """`<photo>-smaller.jpg` is a 75 % resize of `<photo>.jpg` (tests/service_support.py): by the default
    rules the original (most pixels) is kept. A person picks the smaller copy; the plan of the service and
    the plan a `quarantine` would carry out (read from the same catalog) keep it, say why, and the group's
    page shows every member's metadata and the common region on both images: for a resize, the whole of
    each (known by construction). Removing the pick gives the choice back to the rules."""
    from nearsight.indexer.acting.plan import plan_quarantine

    client, writer = server.client(), server.client(API_KEY)
    groups = client.get("/v1/groups?limit=200").json()["groups"]
    group, photo = resized_copy_group(groups)
    ids = {Path(m["path"]).name: m["id"] for m in group["members"]}
    smaller, original = ids[f"{photo}-smaller.jpg"], ids[f"{photo}.jpg"]

    before = client.get(f"/v1/groups/{group['gid']}").json()["now"]
    assert before["keeper"] != smaller and not before["picked"]

    assert client.post_json("/v1/keepers", {"file": smaller}).status == 401  # a write needs the key
    assert writer.post_json("/v1/keepers", {"file": 10**12}).status == 404
    assert writer.post_json("/v1/keepers", {"file": "one"}).status == 400
    r = writer.post_json("/v1/keepers", {"file": smaller, "author": "reviewer"})
    assert r.status == 201 and r.json()["file"] == smaller

    now = client.get(f"/v1/groups/{group['gid']}").json()["now"]
    assert now["keeper"] == smaller and now["picked"] and "chosen by a person" in now["keeper_reason"]
    assert now["members"][0]["id"] == smaller and now["members"][0]["action"] == "keep"
    facts = {m["id"]: m for m in now["members"]}
    with Image.open(facts[original]["path"]) as im:  # the metadata side by side, against Pillow's reading
        assert (facts[original]["width"], facts[original]["height"]) == im.size
        assert facts[original]["format"] == im.format
    match = facts[original]["match"]
    assert match["verified"], match
    assert _iou(match["keeper_box"], (0, 0, 1, 1)) >= 0.85 and _iou(match["member_box"], (0, 0, 1, 1)) >= 0.85

    planned = next(g for g in client.get("/v1/plan?limit=200").json()["groups"] if g["gid"] == group["gid"])
    assert planned["keeper"]["id"] == smaller and "chosen by a person" in planned["keeper"]["reason"]
    with Store.open(server.store, settings=load_settings(environ={})) as store:
        cli_plan = plan_quarantine(store).to_dict()
    assert next(g for g in cli_plan["groups"] if g["gid"] == group["gid"])["keeper"]["id"] == smaller

    r = writer.request("DELETE", f"/v1/keepers/{smaller}")
    assert r.status == 200 and r.json()["removed"] == 1
    assert client.get(f"/v1/groups/{group['gid']}").json()["now"]["keeper"] == before["keeper"]
    client.close()
    writer.close()
