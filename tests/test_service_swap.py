"""Hot reload under load: the nightly job publishes a new generation while clients query a real
server process; no request fails, and once the new generation answers, every later request
gets it. The publish keeps one generation only, so the served one is deleted from disk at the
moment of the swap: requests still in flight finish on it from memory.
"""

import threading
import time

from indexer import generations
from indexer.pipeline import run_index
from indexer.settings import load_settings
from indexer.store import Store

from .service_support import ServerProcess, transformed

CLIENTS = 4


def test_publishing_under_load_fails_no_request_and_later_answers_come_from_the_new_generation(
        service_store, tmp_path):
    store_dir = service_store.copy("swap")
    upload = transformed(service_store.originals["coffee"], tmp_path / "q.jpg").read_bytes()
    server = ServerProcess(store_dir).start()
    with Store.open(store_dir, settings=load_settings(environ={})) as store:
        old = generations.current(store).name
    answers = []           # (started, finished, status or None, generation or error)
    lock = threading.Lock()
    stop = threading.Event()

    def client(n: int) -> None:
        c = server.client()
        kinds = ("similar", "search", "groups")
        i = n
        while not stop.is_set():
            kind = kinds[i % len(kinds)]
            i += 1
            started = time.monotonic()
            try:
                if kind == "similar":
                    r = c.get(f"/v1/images/{1 + i % 150}/similar?k=5")
                elif kind == "search":
                    r = c.post_image("/v1/search?k=5", upload)
                else:
                    r = c.get("/v1/groups?limit=5")
                outcome = (r.status, r.headers.get("x-nearsight-generation"))
            except Exception as exc:  # a failed request is what this test looks for
                outcome = (None, repr(exc))
            with lock:
                answers.append((started, time.monotonic(), *outcome))
        c.close()

    threads = [threading.Thread(target=client, args=(n,)) for n in range(CLIENTS)]
    try:
        for t in threads:
            t.start()
        time.sleep(1.5)
        settings = load_settings(environ={}, overrides={"keep_generations": 1, "workers": 1})
        with Store.open(store_dir, settings=settings) as store:
            new = run_index(store, [service_store.archive], progress=False, calibrate=False)["generation"]
        published = time.monotonic()
        assert not (store_dir / "generations" / old).exists()   # the served generation is gone from disk
        deadline = published + 60
        while time.monotonic() < deadline:
            with lock:
                seen = [a for a in answers if a[3] == new]
            if seen and time.monotonic() - min(a[1] for a in seen) > 1.5:
                break
            time.sleep(0.1)
    finally:
        stop.set()
        for t in threads:
            t.join(timeout=60)
        server.stop()

    failed = [a for a in answers if a[2] != 200]
    assert not failed, failed[:5]
    assert {a[3] for a in answers} == {old, new}
    first_new = min(a[1] for a in answers if a[3] == new)
    stale = [a for a in answers if a[0] > first_new and a[3] != new]
    assert not stale, stale[:5]
    before, after = sum(a[3] == old for a in answers), sum(a[3] == new for a in answers)
    print(f"swap under load: {len(answers)} requests, {before} answered by {old}, {after} by {new}, none failed")
    assert before > 0 and after > 0
    assert "Traceback" not in server.log()
