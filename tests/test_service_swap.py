"""Hot reload under load: the nightly job publishes a new generation while clients query a real
server process; no request fails, and once the new generation answers, every later request
gets it. The publish keeps one generation only, so the served one is deleted from disk at the
moment of the swap: requests still in flight finish on it from memory.
"""

import time

from nearsight.indexer.matching import generations
from nearsight.indexer.building.pipeline import run_index
from nearsight.indexer.core.settings import load_settings
from nearsight.indexer.storage.store import Store

from .service_support import QueryLoad, ServerProcess, transformed

CLIENTS = 4


def test_publishing_under_load_fails_no_request_and_later_answers_come_from_the_new_generation(
        service_store, tmp_path):
    store_dir = service_store.copy("swap")
    upload = transformed(service_store.originals["coffee"], tmp_path / "q.jpg").read_bytes()
    server = ServerProcess(store_dir).start()
    with Store.open(store_dir, settings=load_settings(environ={})) as store:
        old = generations.current(store).name

    def request(c, i):
        kind = ("similar", "search", "groups")[i % 3]
        if kind == "similar":
            return c.get(f"/v1/images/{1 + i % 150}/similar?k=5")
        if kind == "search":
            return c.post_image("/v1/search?k=5", upload)
        return c.get("/v1/groups?limit=5")

    try:
        with QueryLoad(server, CLIENTS, request) as load:
            time.sleep(1.5)
            settings = load_settings(environ={}, overrides={"keep_generations": 1, "workers": 1})
            with Store.open(store_dir, settings=settings) as store:
                new = run_index(store, [service_store.archive], progress=False, calibrate=False)["generation"]
            assert not (store_dir / "generations" / old).exists()   # the served generation is gone from disk
            load.wait_for(new, settle_s=1.5)
    finally:
        server.stop()

    load.assert_swapped(old, new)
    answers = load.answers
    before, after = sum(a[3] == old for a in answers), sum(a[3] == new for a in answers)
    print(f"swap under load: {len(answers)} requests, {before} answered by {old}, {after} by {new}, none failed")
    assert before > 0 and after > 0
    assert "Traceback" not in server.log()
