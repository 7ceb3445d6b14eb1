"""The application's policies, configured several ways, through Flask's test client (in-process;
the real server process is exercised in test_service_api.py): who needs the key, CORS, a
calibrated generation, an unexpected failure, a generation swapped in and out, the CLI's
refusal to listen beyond loopback without a key.
"""

import json
import time

import pytest

from nearsight.indexer.matching import generations
from nearsight.indexer.cli import main as cli_main
from nearsight.indexer.core.errors import UsageError
from nearsight.indexer.matching.generations import CALIBRATION_FILE
from nearsight.indexer.building.pipeline import run_index
from nearsight.indexer.core.settings import load_settings
from nearsight.indexer.storage.store import Store
from nearsight.indexer.matching.rerank import verdict_score
from nearsight.service import create_app

from .service_support import API_KEY, transformed

BEARER = {"Authorization": f"Bearer {API_KEY}"}


@pytest.fixture(scope="module")
def store_dir(service_store):
    return service_store.copy("app")


def _app(store_dir, **config):
    return create_app({"store": store_dir, "settings": load_settings(store_dir=store_dir, environ={}),
                       "watch": False, **config})


def _error(response, status):
    assert response.status_code == status, response.data[:300]
    body = response.get_json()
    assert set(body) >= {"error", "message"} and "Traceback" not in response.get_data(as_text=True)
    return body


def test_beyond_loopback_every_request_needs_the_key_but_probes_and_page_files(store_dir):
    app = _app(store_dir, host="0.0.0.0", api_key=API_KEY)
    c = app.test_client()
    for path in ("/v1/status", "/v1/groups", "/v1/images/1", "/v1/images/1/thumbnail", "/metrics",
                 "/v1/openapi.json", "/v1/verdicts"):
        _error(c.get(path), 401)
        assert c.get(path, headers=BEARER).status_code == 200, path
    for path in ("/healthz", "/readyz", "/", "/static/review.js", "/static/review.css"):
        assert c.get(path).status_code == 200, path


def test_beyond_loopback_without_a_key_the_app_is_not_built(store_dir):
    with pytest.raises(UsageError, match="needs an API key"):
        _app(store_dir, host="0.0.0.0", api_key="")


def test_on_loopback_reads_are_open_and_writes_need_the_key(store_dir):
    c = _app(store_dir, api_key=API_KEY).test_client()
    assert c.get("/v1/status").status_code == 200
    body = {"file_a": 1, "file_b": 2, "verdict": "same"}
    _error(c.post("/v1/verdicts", json=body), 401)
    # With no key configured at all, writing is refused outright (403), never open.
    c = _app(store_dir, api_key="").test_client()
    _error(c.post("/v1/verdicts", json=body), 403)


def test_cors_answers_only_the_configured_origins(store_dir):
    c = _app(store_dir, cors_origins=("https://catalog.example",)).test_client()
    r = c.get("/v1/status", headers={"Origin": "https://catalog.example"})
    assert r.headers["Access-Control-Allow-Origin"] == "https://catalog.example"
    assert "Origin" in r.headers["Vary"]
    assert "Access-Control-Allow-Origin" not in c.get("/v1/status", headers={"Origin": "https://evil.example"}).headers
    # A preflight (Fetch standard: OPTIONS with Access-Control-Request-Method) is answered without the key.
    pre = c.options("/v1/verdicts", headers={"Origin": "https://catalog.example",
                                             "Access-Control-Request-Method": "POST",
                                             "Access-Control-Request-Headers": "authorization, content-type"})
    assert pre.status_code == 200 and "Authorization" in pre.headers["Access-Control-Allow-Headers"]


def test_review_page_is_served_with_a_strict_content_security_policy(store_dir):
    r = _app(store_dir).test_client().get("/")
    assert r.status_code == 200 and r.mimetype == "text/html"
    assert "script-src 'self'" in r.headers["Content-Security-Policy"]
    html = r.get_data(as_text=True)
    assert '<meta name="viewport"' in html and "/static/review.js" in html


def test_an_unexpected_failure_is_a_json_500_without_details(store_dir, monkeypatch):
    from nearsight.service import api as api_module

    def broken(store):
        raise RuntimeError("secret internals")

    monkeypatch.setattr(api_module, "store_status", broken)
    r = _app(store_dir).test_client().get("/v1/status")
    body = _error(r, 500)
    assert body["error"] == "internal_error" and "secret" not in r.get_data(as_text=True)


def test_a_calibrated_generation_answers_precision_with_its_threshold(service_store, tmp_path):
    """Calibration is read only through Generation.load_calibration / .threshold: a calibration.json
    in the shape they read is placed in the generation, and the service's answers are compared with
    what Generation.threshold says for the same precision."""
    store_dir = service_store.copy("calibrated")
    with Store.open(store_dir, settings=load_settings(environ={})) as store:
        gen = generations.current(store)
    curve = {"threshold": [0.2, 0.4, 0.6, 0.8], "precision": [0.5, 0.8, 0.95, 0.99]}
    calibration = {"tiers": {"near": {"threshold": 0.6, "curve": curve},
                             "similar": {"threshold": 0.4, "curve": curve}},
                   "summary": {"headline": "made up for this test"}}
    (gen.path / CALIBRATION_FILE).write_text(json.dumps(calibration))
    c = _app(store_dir).test_client()
    status = c.get("/v1/status").get_json()
    assert status["calibration"] == {"headline": "made up for this test"}
    assert status["thresholds"]["near"] == gen.threshold("near") == 0.6
    data = transformed(service_store.originals["coins"], tmp_path / "q.jpg").read_bytes()
    answer = c.post("/v1/search?precision=0.9", data=data, content_type="image/jpeg").get_json()
    assert answer["threshold"] == gen.threshold("near", 0.9) and answer["threshold_from"] == "precision"
    assert all(r["duplicate"] == (verdict_score(r) >= answer["threshold"]) for r in answer["results"])
    _error(c.post("/v1/search?precision=0.999", data=data, content_type="image/jpeg"), 400)


def test_a_new_generation_is_swapped_in_and_the_old_snapshot_still_answers(service_store):
    store_dir = service_store.copy("swap-inprocess")
    app = _app(store_dir)
    live = app.extensions["nearsight"].live
    old = live.current()
    c = app.test_client()
    first = c.get("/v1/images/1/similar?k=3")
    assert first.headers["X-Nearsight-Generation"] == old.name
    with Store.open(store_dir, settings=load_settings(environ={}, overrides={"keep_generations": 1,
                                                                               "workers": 1})) as store:
        summary = run_index(store, [service_store.archive], progress=False, calibrate=False)
    assert not old.generation.path.exists()          # keep_generations=1 pruned the served one
    assert live.refresh() and live.current().name == summary["generation"] != old.name
    # A request that took the old snapshot before the swap still answers from it (its index, model
    # and groups are in memory), though the old generation's folder is gone.
    catalog = app.extensions["nearsight"].store().catalog
    assert [r["id"] for r in old.searcher.similar_to_id(1, 3, catalog=catalog)] == \
        [r["id"] for r in first.get_json()["results"]]
    assert old.groups_now(catalog).group(old.groups[0].gid) is old.groups[0]
    later = c.get("/v1/images/1/similar?k=3")
    assert later.headers["X-Nearsight-Generation"] == summary["generation"]
    assert c.get("/v1/status").get_json()["service"]["swaps"] == 1
    metrics = c.get("/metrics").get_data(as_text=True)
    assert f'generation="{summary["generation"]}"' in metrics and "nearsight_generation_swaps_total 1.0" in metrics


def test_serve_refuses_to_listen_beyond_loopback_without_a_key(store_dir, capsys):
    assert cli_main(["serve", "--store", str(store_dir), "--host", "0.0.0.0", "--port", "0"]) == 2
    assert "needs an API key" in capsys.readouterr().err


def test_settings_listing_never_shows_the_key(store_dir, capsys, monkeypatch):
    monkeypatch.setenv("NEARSIGHT_API_KEY", API_KEY)
    assert cli_main(["settings", "--store", str(store_dir), "--json"]) == 0
    out = capsys.readouterr().out
    rows = {r["name"]: r for r in json.loads(out)}
    assert rows["api_key"]["value"] == "(set)" and API_KEY not in out
    monkeypatch.setenv("NEARSIGHT_API_KEY", "short")
    assert cli_main(["settings", "--store", str(store_dir)]) == 2


# -- clients that misbehave (service/guard.py) -----------------------------------------------------

def test_a_token_bucket_allows_its_rate_then_says_when_to_come_back():
    """The token bucket by hand (common practice; RFC 2697's meter refills the same way): 3 a minute is a
    full bucket of 3, then one token every 20 s; an empty bucket's Retry-After is the whole seconds until
    the next token; clients and kinds have buckets of their own."""
    from nearsight.service.guard import RateLimiter, TooManyRequestsError

    now = [1000.0]
    limiter = RateLimiter({"uploads": 3, "writes": 0}, clock=lambda: now[0])
    for _ in range(3):
        limiter.take("10.0.0.1", "uploads")
    with pytest.raises(TooManyRequestsError) as refused:
        limiter.take("10.0.0.1", "uploads")
    assert refused.value.retry_after == 20 and refused.value.http_status == 429
    limiter.take("10.0.0.2", "uploads")  # another client
    for _ in range(50):
        limiter.take("10.0.0.1", "writes")  # 0: no limit
    now[0] += 10.0
    with pytest.raises(TooManyRequestsError) as refused:
        limiter.take("10.0.0.1", "uploads")
    assert refused.value.retry_after == 10
    now[0] += 10.0
    limiter.take("10.0.0.1", "uploads")


def test_the_decode_gate_never_lets_more_than_its_limit_in_and_refuses_after_its_wait():
    import threading

    from nearsight.service.guard import BusyError, DecodeGate

    gate, inside, most, lock = DecodeGate(2, wait_s=5.0), [0], [0], threading.Lock()

    def decode():
        with gate.place():
            with lock:
                inside[0] += 1
                most[0] = max(most[0], inside[0])
            time.sleep(0.05)
            with lock:
                inside[0] -= 1

    threads = [threading.Thread(target=decode) for _ in range(8)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert most[0] == 2
    quick = DecodeGate(1, wait_s=0.05)
    with quick.place():
        with pytest.raises(BusyError) as busy:
            with quick.place():
                pass
    assert busy.value.http_status == 503 and busy.value.retry_after >= 1
