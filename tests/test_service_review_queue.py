"""GET /v1/review/pairs on a real `python -m nearsight serve` bound to 127.0.0.1 (tests/service_support.py),
asked with the standard library's http.client: the queue indexer/calibration/review_queue.py computes on the
same store, a judged pair gone at the next request, and bad parameters answered with JSON 400s.
The service's store has no calibration, so the order is closeness to the threshold (the rule's
fallback), checked here against the published pairs read with NumPy."""

import json

import pytest

from nearsight.indexer.matching import generations
from nearsight.indexer.calibration.review_queue import review_queue
from nearsight.indexer.core.settings import load_settings
from nearsight.indexer.storage.store import Store

from .service_support import API_KEY, ServerProcess


@pytest.fixture(scope="module")
def server(service_store):
    """A server of its own on a copy of the store: the verdicts posted here reach no other test."""
    process = ServerProcess(service_store.copy("queue")).start()
    yield process
    process.stop()


def _queue_on_disk(store_dir):
    with Store.open(store_dir, settings=load_settings(environ={})) as store:
        gen = generations.current(store)
        return gen, review_queue(store.catalog, gen), gen.load_pairs()


def test_the_service_serves_the_queue_and_a_judged_pair_leaves_it(server):
    client, writer = server.client(), server.client(API_KEY)
    r = client.get("/v1/review/pairs?limit=200")
    assert r.status == 200 and r.headers["content-type"].startswith("application/json")
    page = r.json()
    gen, queue, (a, b, sims) = _queue_on_disk(server.store)
    assert page["generation"] == gen.name and page["probability_from"] is None
    assert page["threshold"] == float(gen.meta["thresholds"]["near"])
    assert page["total"] == len(queue.pairs) > 3
    assert [(p["a"]["id"], p["b"]["id"]) for p in page["pairs"]] == [(p.a["id"], p.b["id"]) for p in queue.pairs[:200]]
    # Each offered pair is a published pair with its published score, and its files are named by their paths.
    published = {(int(x), int(y)): float(s) for x, y, s in zip(a, b, sims)}
    t = page["threshold"]
    for p in page["pairs"]:
        assert p["similarity"] == pytest.approx(published[(p["a"]["id"], p["b"]["id"])], abs=1e-6)
        assert p["probability"] is None and "threshold" in p["why"]
    # Without a calibration: within a round, nearest the threshold first; no image twice in a round.
    for rnd in {p["round"] for p in page["pairs"]}:
        members = [p for p in page["pairs"] if p["round"] == rnd]
        gaps = [abs(p["similarity"] - t) for p in members]
        assert all(later >= earlier - 2e-6 for earlier, later in zip(gaps, gaps[1:]))  # scores are sent to 6 places
        files = [f for p in members for f in (p["a"]["id"], p["b"]["id"])]
        assert len(files) == len(set(files))
    # Paging: offset and limit cut the same list.
    second = client.get("/v1/review/pairs?limit=2&offset=1").json()
    assert second["pairs"] == page["pairs"][1:3] and second["limit"] == 2 and second["offset"] == 1

    first = page["pairs"][0]
    r = writer.post_json("/v1/verdicts", {"file_a": first["a"]["id"], "file_b": first["b"]["id"],
                                          "verdict": "different"})
    assert r.status == 201, r.body
    after = client.get("/v1/review/pairs?limit=200").json()
    assert after["total"] == page["total"] - 1
    assert after["left_out"]["judged"] == page["left_out"]["judged"] + 1
    offered = [(p["a"]["id"], p["b"]["id"]) for p in after["pairs"]]
    assert (first["a"]["id"], first["b"]["id"]) not in offered
    _, queue_after, _ = _queue_on_disk(server.store)
    assert offered == [(p.a["id"], p.b["id"]) for p in queue_after.pairs[:200]]


@pytest.mark.parametrize("query, name", [
    ("limit=0", "limit"), ("limit=201", "limit"), ("limit=ten", "limit"), ("limit=1.5", "limit"),
    ("offset=-1", "offset"), ("offset=x", "offset"),
])
def test_bad_parameters_get_a_json_400(server, query, name):
    r = server.client().get("/v1/review/pairs?" + query)
    assert r.status == 400 and r.headers["content-type"].startswith("application/json")
    body = json.loads(r.body)
    assert body["error"] == "bad_request" and body["message"].startswith(name)

