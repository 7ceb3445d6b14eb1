"""A soak on loopback: many clients at once, good and bad, against a real `nearsight serve`.

Each client thread loops for the whole run, pausing about a quarter of a second between requests, over a mix: good requests (GET /v1/status, GET /v1/groups,
POST /v1/search with a small JPEG), an oversized upload (over max_upload_bytes: 413), a garbage upload
(random bytes: 415 or 422); two clients are slow senders that trickle a request's body a few bytes at a time. The
server's resident memory (VmRSS from /proc) is sampled all along. Two of the clients only ever trickle. What must hold: no 5xx, every good
request answered, memory within a stated bound, and the good requests' p99 latency within 3x of the same
requests on the idle server (measured first, in the same run).

    .venv/bin/python benchmarks/bench_soak.py --store STORE --seconds 60 --clients 16

Writes benchmarks/results/soak.md unless --out says otherwise. `soak()` is what tests/test_service_guard.py
runs for a few seconds.
"""

from __future__ import annotations

import argparse
import http.client
import io
import random
import socket
import statistics
import sys
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from benchmarks.common import machine, write_report  # noqa: E402

GOOD = ("status", "groups", "search")


@dataclass
class Tally:
    statuses: dict = field(default_factory=dict)  # (kind, status) -> count
    good_latency_ms: list = field(default_factory=list)
    unanswered: int = 0  # good requests that got no answer (connection error, timeout)
    lock: threading.Lock = field(default_factory=threading.Lock)

    def add(self, kind: str, status: int, ms: float | None = None) -> None:
        with self.lock:
            self.statuses[(kind, status)] = self.statuses.get((kind, status), 0) + 1
            if ms is not None:
                self.good_latency_ms.append(ms)

    @property
    def server_errors(self) -> int:
        return sum(n for (_, status), n in self.statuses.items() if status >= 500)


def small_jpeg() -> bytes:
    from PIL import Image

    out = io.BytesIO()
    Image.effect_noise((320, 240), 40).convert("RGB").save(out, "JPEG", quality=85)
    return out.getvalue()


def _request(host, port, method, path, body=None, headers=None, timeout=60.0):
    conn = http.client.HTTPConnection(host, port, timeout=timeout)
    try:
        conn.request(method, path, body=body, headers=headers or {})
        response = conn.getresponse()
        response.read()
        return response.status
    finally:
        conn.close()


def _good(host, port, kind, image) -> tuple[int, float]:
    started = time.perf_counter()
    if kind == "status":
        status = _request(host, port, "GET", "/v1/status")
    elif kind == "groups":
        status = _request(host, port, "GET", "/v1/groups?limit=20")
    else:
        status = _request(host, port, "POST", "/v1/search?k=5", image, {"Content-Type": "image/jpeg"})
    return status, (time.perf_counter() - started) * 1000


def _slow_sender(host, port, stop: threading.Event) -> None:
    """A client that sends headers, then its body a few bytes a second until the run ends."""
    body = b"x" * 4096
    with socket.create_connection((host, port), timeout=5) as sock:
        sock.sendall(f"POST /v1/search HTTP/1.1\r\nHost: 127.0.0.1\r\nContent-Type: image/jpeg\r\n"
                     f"Content-Length: {len(body)}\r\n\r\n".encode())
        for i in range(0, len(body), 8):
            if stop.is_set():
                return
            try:
                sock.sendall(body[i:i + 8])
            except OSError:  # the server closed a stalled client: what it should do
                return
            time.sleep(0.5)


def soak(host: str, port: int, *, clients: int, seconds: float, image: bytes, oversized: int,
         pid: int | None = None, pause: float = 0.25, slow_clients: int = 2) -> dict:
    """Run the mix; returns statuses per kind, good latencies, unanswered good requests and peak RSS (MiB).
    Each client waits `pause` seconds (0.5 to 1.5 times, at random) between requests, as people and
    pipelines do: the measure is what the bad requests do to the good ones, not a saturated server. The first
    `slow_clients` clients only trickle requests (a few bytes every half second)."""
    tally, stop = Tally(), threading.Event()
    rng = random.Random(0)
    peak = [0.0]

    def client(n: int) -> None:
        local = random.Random(n)
        while not stop.is_set():
            if n < slow_clients:  # a stalled client: one trickling request after another, all run long
                _slow_sender(host, port, stop)
                tally.add("slow", 0)
                continue
            roll = local.random()
            try:
                if roll < 0.8:
                    kind = GOOD[local.randrange(3)]
                    status, ms = _good(host, port, kind, image)
                    tally.add(kind, status, ms)
                elif roll < 0.9:
                    tally.add("oversized", _request(host, port, "POST", "/v1/search", b"\0" * oversized,
                                                    {"Content-Type": "image/jpeg"}))
                else:
                    tally.add("garbage", _request(host, port, "POST", "/v1/search", rng.randbytes(50_000),
                                                  {"Content-Type": "image/jpeg"}))
            except (OSError, http.client.HTTPException):
                if roll < 0.8:
                    with tally.lock:
                        tally.unanswered += 1
            stop.wait(pause * local.uniform(0.5, 1.5))

    def watch_memory() -> None:
        while not stop.is_set() and pid:
            peak[0] = max(peak[0], rss_mib(pid))
            time.sleep(0.2)

    threads = [threading.Thread(target=client, args=(n,), daemon=True) for n in range(clients)]
    threads.append(threading.Thread(target=watch_memory, daemon=True))
    for t in threads:
        t.start()
    time.sleep(seconds)
    stop.set()
    for t in threads:
        t.join(timeout=30)
    return {"statuses": {f"{k} {s}": n for (k, s), n in sorted(tally.statuses.items())},
            "server_errors": tally.server_errors, "unanswered": tally.unanswered,
            "good": len(tally.good_latency_ms), "good_latency_ms": tally.good_latency_ms, "peak_rss_mib": peak[0]}


def rss_mib(pid: int) -> float:
    try:
        for line in Path(f"/proc/{pid}/status").read_text().splitlines():
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) / 1024
    except OSError:
        pass
    return 0.0


def p99(values: list[float]) -> float:
    return statistics.quantiles(values, n=100)[98] if len(values) >= 2 else (values[0] if values else 0.0)


def idle_latency(host: str, port: int, image: bytes, rounds: int = 30) -> list[float]:
    for kind in GOOD * 3:  # warm up (the first search loads what it needs), not measured
        _good(host, port, kind, image)
    return [_good(host, port, kind, image)[1] for _ in range(rounds) for kind in GOOD]


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--store", type=Path, required=True, help="an indexed store (a copy: nothing is written)")
    ap.add_argument("--seconds", type=float, default=60.0)
    ap.add_argument("--clients", type=int, default=16)
    ap.add_argument("--out", type=Path, default=ROOT / "benchmarks/results/soak.md")
    args = ap.parse_args()
    from tests.service_support import ServerProcess

    limit = 2 * 1024 * 1024
    server = ServerProcess(args.store, env={"NEARSIGHT_MAX_UPLOAD_BYTES": str(limit), "NEARSIGHT_RATE_UPLOADS": "0",
                                            "NEARSIGHT_CLIENT_TIMEOUT_S": "10"}).start()
    try:
        image = small_jpeg()
        idle = idle_latency(server.host, server.port, image)
        rest = rss_mib(server.proc.pid)
        result = soak(server.host, server.port, clients=args.clients, seconds=args.seconds, image=image,
                      oversized=limit + 1024, pid=server.proc.pid)
    finally:
        server.stop()
    busy = result["good_latency_ms"]
    lines = [
        "# Soak: misbehaving clients beside good ones",
        "",
        f"Machine: {machine()}. Command: `.venv/bin/python benchmarks/bench_soak.py --store STORE "
        f"--seconds {args.seconds:g} --clients {args.clients}` (a real `nearsight serve` on 127.0.0.1, 8 threads).",
        "",
        "| measure | value |",
        "|---|---:|",
        f"| good requests answered | {result['good']} (unanswered: {result['unanswered']}) |",
        f"| 5xx answers | {result['server_errors']} |",
        f"| good p99, idle server | {p99(idle):.1f} ms |",
        f"| good p99, under the soak | {p99(busy):.1f} ms ({p99(busy) / max(p99(idle), 1e-9):.1f}x idle) |",
        f"| server memory (VmRSS) at rest, peak under the soak | {rest:.0f} MiB, {result['peak_rss_mib']:.0f} MiB |",
        "",
        "| request kind and status | count |",
        "|---|---:|",
        *(f"| {k} | {n} |" for k, n in result["statuses"].items()),
        "",
        "A slow sender is counted once its trickle ends (status 0: the run ended, or the server closed it).",
        "",
    ]
    return write_report(args.out, lines)


if __name__ == "__main__":
    sys.exit(main())
