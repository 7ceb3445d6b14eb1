"""HTTP service latency against in-process latency for the same searches, and throughput by concurrency.

Builds a store from the invented demo archive (`demo_data.generate`, seed 7) with the default
encoder (resnet_narrow at 128 px; a few training steps only: speed does not depend on the
weights), then in one run:

* the same queries in-process (`Searcher.similar_to_id`, `Searcher.similar_to_upload`) and over
  HTTP to `python -m nearsight serve` on 127.0.0.1 (GET /v1/images/<id>/similar, POST /v1/search
  with the raw JPEG), alternating in rounds so that drift hits both alike; the ratio of medians
  is the cost of the HTTP layer (Flask, waitress, JSON, loopback TCP, the SQLite path lookup is
  in both);
* id queries: k=10 neighbours of catalogued images from their stored vectors;
* uploads: 1-megapixel JPEGs (demo originals scaled to ~1000x1000 px area, quality 90), decoded,
  embedded and searched;
* throughput over HTTP with 1, 4 and 8 concurrent clients (one keep-alive connection each,
  8 server threads) for --seconds each.

Nothing is asserted; numbers depend on the machine. Writes benchmarks/results/http.md.

    .venv/bin/python benchmarks/bench_http.py [--seconds 10] [--rounds 5] [--out benchmarks/results/http.md]
"""

from __future__ import annotations

import argparse
import http.client
import io
import json
import logging
import multiprocessing
import os
import signal
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

# torch and faiss-cpu each bring their own GNU OpenMP runtime (two libgomp copies in one process), and by
# default both spin-wait after parallel work. Measured while writing this benchmark on 2 busy cores: alternating
# embedding and search in a script's main thread then took 30-440 ms per 1 MP upload (median over 8, varying
# run to run) while the same searches through the server took ~24 ms. With passive waiting both paths are
# steady, so both processes (this one and the server, which inherits the environment) run with it; it must be
# set before either library loads. The report names the policy used.
os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")

import numpy as np  # noqa: E402
from PIL import Image  # noqa: E402

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from nearsight.demo_data.generate import generate  # noqa: E402
from nearsight.indexer.core.errors import ImageReadError  # noqa: E402
from nearsight.indexer.reading.images import read_image  # noqa: E402
from benchmarks.common import DEFAULT_LIBRARIES, machine  # noqa: E402
from nearsight.indexer.building.pipeline import run_index  # noqa: E402
from nearsight.indexer.matching.query import Searcher  # noqa: E402
from nearsight.indexer.core.settings import load_settings  # noqa: E402
from nearsight.indexer.storage.store import Store  # noqa: E402
from nearsight.indexer.learning.train import TrainConfig  # noqa: E402

K = 10
UPLOADS = 8
ID_QUERIES = 40
MAX_PIXELS = 50_000_000


def one_megapixel_jpegs(archive: Path, n: int) -> list[bytes]:
    out = []
    for path in sorted(archive.rglob("*.jpg"))[::3]:
        if len(out) == n:
            break
        try:
            im, _info = read_image(path)
        except ImageReadError:  # the demo archive plants damaged files on purpose
            continue
        scale = (1_000_000 / (im.width * im.height)) ** 0.5
        im = im.resize((round(im.width * scale), round(im.height * scale)), Image.Resampling.LANCZOS)
        buf = io.BytesIO()
        im.save(buf, format="JPEG", quality=90)
        out.append(buf.getvalue())
    return out


class Client:
    def __init__(self, host: str, port: int):
        self.conn = http.client.HTTPConnection(host, port, timeout=120)

    def request(self, method: str, path: str, body: bytes | None = None, headers: dict | None = None) -> int:
        self.conn.request(method, path, body=body, headers=headers or {})
        r = self.conn.getresponse()
        r.read()
        return r.status

    def close(self) -> None:
        self.conn.close()


def start_server(store: Path, threads: int = 8) -> tuple[subprocess.Popen, str, int]:
    env = {k: v for k, v in os.environ.items() if not k.startswith("NEARSIGHT_")}
    env["PYTHONPATH"] = str(ROOT)
    # The per-client upload limit (120 a minute by default) would answer most of the throughput runs with 429:
    # this measures what the server can do, so it is lifted.
    env["NEARSIGHT_RATE_UPLOADS"] = "0"
    proc = subprocess.Popen([sys.executable, "-m", "nearsight", "serve", "--store", str(store), "--host", "127.0.0.1",
                             "--port", "0", "--threads", str(threads), "--quiet"],
                            stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, text=True, env=env)
    for line in proc.stdout:
        if "listening on http://" in line:
            host, port = line.split("listening on http://", 1)[1].split("/", 1)[0].rsplit(":", 1)
            threading.Thread(target=proc.stdout.read, daemon=True).start()
            return proc, host, int(port)
    raise RuntimeError("server did not start")


def timed(fn) -> float:
    started = time.perf_counter()
    fn()
    return time.perf_counter() - started


def latency(store_dir: Path, host: str, port: int, ids: list[int], uploads: list[bytes], rounds: int) -> dict:
    with Store.open(store_dir, settings=load_settings(environ={})) as store:
        searcher = Searcher(store)
        catalog = store.catalog
        client = Client(host, port)
        times = {(kind, where): [] for kind in ("id", "upload") for where in ("in-process", "http")}
        # Warm both sides (first calls pay for lazy setup).
        for data in uploads[:2]:
            searcher.similar_to_upload(data, K, max_pixels=MAX_PIXELS, catalog=catalog)
            client.request("POST", f"/v1/search?k={K}", data, {"Content-Type": "image/jpeg"})
        for image_id in ids[:5]:
            searcher.similar_to_id(image_id, K, catalog=catalog)
            client.request("GET", f"/v1/images/{image_id}/similar?k={K}")
        for _ in range(rounds):
            for image_id in ids:
                times["id", "in-process"].append(timed(lambda: searcher.similar_to_id(image_id, K, catalog=catalog)))
                times["id", "http"].append(timed(lambda: client.request("GET", f"/v1/images/{image_id}/similar?k={K}")))
            for data in uploads:
                times["upload", "in-process"].append(timed(
                    lambda: searcher.similar_to_upload(data, K, max_pixels=MAX_PIXELS, catalog=catalog)))
                times["upload", "http"].append(timed(
                    lambda: client.request("POST", f"/v1/search?k={K}", data, {"Content-Type": "image/jpeg"})))
        client.close()
    return {key: np.array(v) * 1000 for key, v in times.items()}


def throughput(host: str, port: int, kind: str, clients: int, seconds: float, ids: list[int],
               uploads: list[bytes]) -> dict:
    stop_at = time.monotonic() + seconds
    records: list[tuple[int, float]] = []
    lock = threading.Lock()

    def run(n: int) -> None:
        c = Client(host, port)
        mine, i = [], n
        while time.monotonic() < stop_at:
            i += 1
            started = time.perf_counter()
            if kind == "id":
                status = c.request("GET", f"/v1/images/{ids[i % len(ids)]}/similar?k={K}")
            else:
                status = c.request("POST", f"/v1/search?k={K}", uploads[i % len(uploads)], {"Content-Type": "image/jpeg"})
            mine.append((status, time.perf_counter() - started))
        c.close()
        with lock:
            records.extend(mine)

    threads = [threading.Thread(target=run, args=(n,)) for n in range(clients)]
    started = time.monotonic()
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    wall = time.monotonic() - started
    ms = np.array([s for _, s in records]) * 1000
    return {"requests": len(records), "per_s": len(records) / wall, "p50": float(np.percentile(ms, 50)),
            "p99": float(np.percentile(ms, 99)), "errors": sum(s != 200 for s, _ in records)}


def build_store(work: Path, originals: int) -> None:
    """The demo archive and its store, with a few training steps (speed does not depend on the weights)."""
    generate(work / "archive", seed=7, originals=originals)
    with Store.open(work / "store", create=True, settings=load_settings(environ={})) as store:
        summary = run_index(store, [work / "archive"], progress=False, calibrate=False,
                            train_config=TrainConfig(steps=5, minutes=None, heldout=16, workers=0, seed=0))
    (work / "summary.json").write_text(json.dumps({k: summary[k] for k in ("model", "indexed", "generation")}))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--seconds", type=float, default=10.0, help="seconds per throughput measurement")
    parser.add_argument("--rounds", type=int, default=5, help="rounds of the latency comparison")
    parser.add_argument("--originals", type=int, default=160, help="demo archive originals")
    parser.add_argument("--out", type=Path, default=ROOT / "benchmarks" / "results" / "http.md")
    args = parser.parse_args()
    logging.basicConfig(level=logging.WARNING)

    with tempfile.TemporaryDirectory(prefix="bench-http-") as tmp:
        work = Path(tmp)
        started = time.monotonic()
        store_dir = work / "store"
        # Built in a spawned process, so that this one holds what a server holds (a loaded model and index),
        # not the leftovers of generating and training (fork pools, thread pools, a training loop's memory).
        builder = multiprocessing.get_context("spawn").Process(target=build_store,
                                                                args=(work, args.originals))
        builder.start()
        builder.join()
        if builder.exitcode != 0:
            raise SystemExit(f"building the store failed (exit {builder.exitcode})")
        summary = json.loads((work / "summary.json").read_text())
        with Store.open(store_dir, settings=load_settings(environ={})) as store:
            ids = sorted(store.catalog.image_meta())[:ID_QUERIES]
            card = json.loads((store.models_dir / summary["model"] / "card.json").read_text())
        uploads = one_megapixel_jpegs(work / "archive", UPLOADS)
        print(f"store built in {time.monotonic() - started:.0f} s: {summary['indexed']} images", flush=True)

        proc, host, port = start_server(store_dir)
        try:
            lat = latency(store_dir, host, port, ids, uploads, args.rounds)
            print("latency measured", flush=True)
            tput = {(kind, n): throughput(host, port, kind, n, args.seconds, ids, uploads)
                    for kind in ("id", "upload") for n in (1, 4, 8)}
        finally:
            proc.send_signal(signal.SIGINT)
            proc.wait(timeout=30)

    sizes = [Image.open(io.BytesIO(u)).size for u in uploads]
    lines = [
        "## HTTP service against in-process search",
        "",
        f"Machine: {machine(DEFAULT_LIBRARIES + ('flask', 'werkzeug', 'waitress'))}.",
        "",
        f"Store: the demo archive (seed 7, {args.originals} originals): {summary['indexed']} images, index "
        f"`IDMap2,Flat`, encoder {card['arch']} at {card['image_size']} px, {card['dim']}-d. "
        f"Server: `nearsight serve`, waitress, 8 threads, on 127.0.0.1; client: http.client, one keep-alive "
        f"connection per client. k={K}. Uploads: {len(uploads)} JPEGs of "
        f"{min(w * h for w, h in sizes) / 1e6:.2f}-{max(w * h for w, h in sizes) / 1e6:.2f} megapixels, quality 90, "
        f"{np.mean([len(u) for u in uploads]) / 1024:.0f} KB on average. OMP_WAIT_POLICY={os.environ['OMP_WAIT_POLICY']} "
        "in both processes (see the note at the top of bench_http.py).",
        "",
        "### Latency, one client, same queries (ms)",
        "",
        f"{args.rounds} rounds alternating in-process and HTTP; {ID_QUERIES} id queries and {len(uploads)} uploads per round.",
        "",
        "| query | in-process p50 | HTTP p50 | HTTP / in-process (p50) | in-process p90 | HTTP p90 |",
        "|---|---:|---:|---:|---:|---:|",
    ]
    for kind, label in (("id", "similar to a catalogued id"), ("upload", "search by 1 MP JPEG upload")):
        a, b = lat[kind, "in-process"], lat[kind, "http"]
        lines.append(f"| {label} | {np.median(a):.2f} | {np.median(b):.2f} | {np.median(b) / np.median(a):.2f} "
                     f"| {np.percentile(a, 90):.2f} | {np.percentile(b, 90):.2f} |")
    lines += ["", f"### Throughput over HTTP ({args.seconds:.0f} s per cell)", "",
              "| query | clients | requests/s | p50 (ms) | p99 (ms) | non-200 |", "|---|---:|---:|---:|---:|---:|"]
    for (kind, n), r in tput.items():
        label = "id" if kind == "id" else "1 MP upload"
        lines.append(f"| {label} | {n} | {r['per_s']:.1f} | {r['p50']:.1f} | {r['p99']:.1f} | {r['errors']} |")
    lines += ["", "The server process and the benchmark's clients share the machine's cores, so the 4- and 8-client "
              "rows include the clients' own cost."]
    text = "\n".join(lines) + "\n"
    args.out.parent.mkdir(parents=True, exist_ok=True)
    args.out.write_text(text)
    print(text)


if __name__ == "__main__":
    main()
