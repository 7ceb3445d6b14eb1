"""Clients that misbehave, against a real `python -m nearsight serve` on 127.0.0.1 (tests/service_support.py):
the per-client rate limit answers 429 with Retry-After (RFC 6585 section 4 defines 429 and allows
Retry-After; RFC 9110 section 10.2.3 its form, whole seconds), the decode cap answers 503 with Retry-After
(RFC 9110 section 15.6.4), and a short soak of good and bad clients together gets no 5xx and answers every
good request (benchmarks/bench_soak.py runs the full minute and states the latency and memory figures).
"""

from __future__ import annotations

import threading

import pytest

from benchmarks.bench_soak import small_jpeg, soak

from .service_support import API_KEY, ServerProcess


@pytest.fixture(scope="module")
def limited(service_store):
    """A server whose clients may upload twice a minute and write twice a minute."""
    process = ServerProcess(service_store.copy("limited"),
                            env={"NEARSIGHT_RATE_UPLOADS": "2", "NEARSIGHT_RATE_WRITES": "2"}).start()
    yield process
    process.stop()


def test_the_third_upload_in_a_minute_gets_429_with_retry_after(limited):
    client = limited.client()
    image = small_jpeg()
    answers = [client.request("POST", "/v1/search?k=3", image, {"Content-Type": "image/jpeg"}) for _ in range(3)]
    assert [a.status for a in answers] == [200, 200, 429]
    refused = answers[2]
    assert refused.json()["error"] == "too_many_requests" and "a minute" in refused.json()["message"]
    assert refused.headers["retry-after"].isdigit() and 1 <= int(refused.headers["retry-after"]) <= 30
    assert client.get("/v1/status").status == 200  # reads are not limited
    client.close()


def test_writes_have_their_own_limit(limited):
    writer = limited.client(API_KEY)
    statuses = [writer.post_json("/v1/verdicts", {"file_a": 10**12, "file_b": 10**12 + 1, "verdict": "same"}).status
                for _ in range(3)]
    # The first two are refused for their ids (no such images) but count against the limit; the third is not read.
    assert statuses[0] == statuses[1] and statuses[0] in (400, 404) and statuses[2] == 429
    writer.close()


def test_the_decode_cap_turns_a_crowd_of_uploads_into_503s_not_a_crash(service_store):
    """One decode at a time, and a 10 ms wait for it: eight large uploads sent at once, each answered 200
    or 503 with Retry-After, at least one of each."""
    import io

    from PIL import Image

    process = ServerProcess(service_store.copy("one-decode"),
                            env={"NEARSIGHT_MAX_DECODES": "1", "NEARSIGHT_DECODE_WAIT_S": "0.01"}).start()
    try:
        buf = io.BytesIO()
        Image.effect_noise((2400, 1800), 60).convert("RGB").save(buf, "JPEG", quality=90)
        data, answers = buf.getvalue(), []

        def send():
            client = process.client()
            answers.append(client.request("POST", "/v1/search?k=3", data, {"Content-Type": "image/jpeg"}))
            client.close()

        threads = [threading.Thread(target=send) for _ in range(8)]
        for t in threads:
            t.start()
        for t in threads:
            t.join()
    finally:
        process.stop()
    statuses = sorted(a.status for a in answers)
    assert set(statuses) == {200, 503}, statuses
    assert all(a.headers.get("retry-after", "").isdigit() and a.json()["error"] == "busy"
               for a in answers if a.status == 503)


def test_a_short_soak_gets_no_5xx_and_every_good_request_answered(service_store):
    process = ServerProcess(service_store.copy("soak"), env={"NEARSIGHT_MAX_UPLOAD_BYTES": str(1024 * 1024),
                                                            "NEARSIGHT_RATE_UPLOADS": "0",
                                                            "NEARSIGHT_CLIENT_TIMEOUT_S": "3"}).start()
    try:
        result = soak(process.host, process.port, clients=8, seconds=6, image=small_jpeg(),
                      oversized=1024 * 1024 + 4096, pid=process.proc.pid)
    finally:
        process.stop()
    assert result["server_errors"] == 0, result["statuses"]
    assert result["unanswered"] == 0 and result["good"] > 20, result["statuses"]
    good = {k: n for k, n in result["statuses"].items() if k.split()[0] in ("status", "groups", "search")}
    assert all(k.endswith(" 200") for k in good), good
    bad = {k for k in result["statuses"] if k.split()[0] in ("oversized", "garbage")}
    assert all(k.split()[1] in ("413", "415", "422") for k in bad), bad
