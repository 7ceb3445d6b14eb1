"""A bounded load test on loopback: 8 concurrent clients for about 20 seconds against a real
server process on 127.0.0.1 (the session's server). Every request must be answered, none with
a 5xx. Latencies are recorded, not asserted (speed lives in benchmarks/): p50 and p99 per kind
of request are printed and written to test-artifacts/http-load.md.
"""

import threading
import time

import numpy as np
import pytest

from .service_support import artifacts_dir, transformed

CLIENTS = 8
SECONDS = 20.0
MIX = ("similar", "similar", "search", "groups", "thumbnail", "similar", "search", "status")


@pytest.mark.slow
def test_eight_clients_for_twenty_seconds_get_no_server_error(live_server, service_store, tmp_path):
    uploads = [transformed(path, tmp_path / f"{name}.jpg").read_bytes()
               for name, path in list(service_store.originals.items())[:8]]
    records = []   # (kind, status or None, seconds)
    lock = threading.Lock()
    stop_at = time.monotonic() + SECONDS

    def client(n: int) -> None:
        c = live_server.client()
        i = n
        mine = []
        while time.monotonic() < stop_at:
            kind = MIX[i % len(MIX)]
            i += 1
            started = time.perf_counter()
            try:
                if kind == "similar":
                    r = c.get(f"/v1/images/{1 + (i * 7) % 160}/similar?k=10")
                elif kind == "search":
                    r = c.post_image("/v1/search?k=10", uploads[i % len(uploads)])
                elif kind == "groups":
                    r = c.get(f"/v1/groups?limit=20&offset={(i % 3) * 20}")
                elif kind == "thumbnail":
                    r = c.get(f"/v1/images/{1 + i % 160}/thumbnail")
                else:
                    r = c.get("/v1/status")
                status = r.status
            except Exception:  # counted as a failure below
                status = None
            mine.append((kind, status, time.perf_counter() - started))
        c.close()
        with lock:
            records.extend(mine)

    threads = [threading.Thread(target=client, args=(n,)) for n in range(CLIENTS)]
    started = time.monotonic()
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=SECONDS + 120)
    wall = time.monotonic() - started

    lines = [f"# HTTP load test: {CLIENTS} clients for {SECONDS:.0f} s on loopback", "",
             f"{len(records)} requests in {wall:.1f} s ({len(records) / wall:.1f} per second); "
             f"server threads 8.", "",
             "| request | n | p50 (ms) | p99 (ms) | max (ms) |", "|---|---:|---:|---:|---:|"]
    for kind in ("all", *sorted(set(MIX))):
        secs = np.array([s for k, _, s in records if kind in ("all", k)]) * 1000
        lines.append(f"| {kind} | {len(secs)} | {np.percentile(secs, 50):.1f} | {np.percentile(secs, 99):.1f} "
                     f"| {secs.max():.1f} |")
    report = "\n".join(lines) + "\n"
    out = artifacts_dir() / "http-load.md"
    out.write_text(report)
    print(report + f"\n(written to {out})")

    failures = [r for r in records if r[1] is None or r[1] >= 500]
    assert not failures, failures[:10]
    assert all(r[1] in (200, 304) for r in records), {r[1] for r in records}
