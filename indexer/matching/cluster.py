"""Embedding spread over many processes or machines: batches of files out, vectors back.

The work unit is `embed_batch(paths, model_dir)`: a pure function of files and
a model folder (both on a path every worker shares with the coordinator). It is
submitted through any executor with the `concurrent.futures` shape: a Dask
`distributed.Client` for a cluster (`nearsight index --cluster ADDRESS`), or a
local process pool. The coordinator alone writes the catalog, so the store's
guarantees (whole blocks committed, resume, atomic publish) hold unchanged.

A worker loads the model once and keeps it for every later batch. A worker lost
mid-batch costs only that batch: Dask reruns it on another worker (`retries`),
and its result reaches the coordinator once, as the future's one result.
"""

from __future__ import annotations

import logging
import threading
from collections import deque
from dataclasses import dataclass
from pathlib import Path
from typing import Callable, Iterator, Sequence

import numpy as np

from ..core.errors import UsageError
from ..reading.scan import CLUSTER_RETRIES

log = logging.getLogger(__name__)

# A batch of 256 files is a few seconds of decoding and embedding on one core, so the
# scheduler's per-task cost (about a millisecond for Dask) stays far below 1 %.
BATCH_FILES = 256
IN_FLIGHT_PER_WORKER = 2  # batches queued per worker: keeps it busy, bounds memory
RETRIES = CLUSTER_RETRIES

_models: dict[tuple[str, str], tuple] = {}
_models_lock = threading.Lock()
_worker_threads: int | None = None  # threads of a worker's encoder; None = every core (set by _single_thread_worker)


@dataclass(frozen=True)
class BatchResult:
    """`vectors[k]` embeds `paths[start + ok[k]]`; `errors` maps a failed offset to its reason."""

    start: int
    ok: np.ndarray
    vectors: np.ndarray
    errors: dict[int, str]


def _model(model_dir: str, runtime: str):
    """The worker's copy of the model, loaded once per process (tasks may run in threads), run as the store's
    `runtime` setting says (indexer/learning/runtime.py)."""
    with _models_lock:
        if (model_dir, runtime) not in _models:
            from ..learning.runtime import OnnxEncoder, load_encoder

            encoder, card = load_encoder(Path(model_dir), runtime, threads=_worker_threads)
            if _worker_threads == 1 and not isinstance(encoder, OnnxEncoder):
                import torch

                torch.set_num_threads(1)
            _models[(model_dir, runtime)] = encoder, card
        return _models[(model_dir, runtime)]


def embed_batch(start: int, paths: Sequence[str], model_dir: str, batch_size: int = 64,
                runtime: str = "auto") -> BatchResult:
    """Embed one batch of files with the model in `model_dir` (runs on a worker)."""
    from ..learning.embed import iter_embed_files

    encoder, card = _model(model_dir, runtime)
    size = int(card["image_size"])
    ok, blocks, errors = [], [], {}
    for ids, xb, block_errors in iter_embed_files(list(paths), encoder, size, batch_size=batch_size, workers=0):
        ok.extend(int(i) for i in ids)
        blocks.append(xb)
        errors.update(block_errors)
    vectors = np.concatenate(blocks) if blocks else np.zeros((0, int(card.get("dim", 0))), np.float32)
    return BatchResult(start, np.asarray(ok, dtype=np.int64), vectors, errors)


def batches(n: int, size: int = BATCH_FILES) -> list[tuple[int, int]]:
    if size < 1:
        raise UsageError(f"batch size must be >= 1, got {size}")
    return [(lo, min(n, lo + size)) for lo in range(0, n, size)]


def iter_distributed(paths: Sequence[str], model_dir: Path, *, submit: Callable, as_completed: Callable,
                     workers: int, batch_files: int = BATCH_FILES, runtime: str = "auto") -> Iterator[BatchResult]:
    """Yield each batch's result as it completes, keeping about 2 batches per worker in flight.

    `submit(fn, *args)` returns a future; `as_completed(futures)` yields finished ones
    (concurrent.futures and distributed share this shape)."""
    pending = deque(batches(len(paths), batch_files))
    limit = max(1, workers * IN_FLIGHT_PER_WORKER)
    running = set()
    model_dir = str(model_dir)

    def top_up() -> None:
        while pending and len(running) < limit:
            lo, hi = pending.popleft()
            running.add(submit(embed_batch, lo, list(map(str, paths[lo:hi])), model_dir, 64, runtime))

    top_up()
    while running:
        done = next(iter(as_completed(list(running))))
        running.discard(done)
        yield done.result()
        top_up()


def dask_client(address: str):
    """A client for the Dask scheduler at `address` (e.g. tcp://10.0.0.5:8786)."""
    try:
        from distributed import Client
    except ImportError:
        raise UsageError("--cluster needs Dask's distributed package: pip install 'nearsight[cluster]'") from None
    try:
        return Client(address, timeout="20s")
    except (OSError, TimeoutError) as exc:
        raise UsageError(f"cannot reach the Dask scheduler at {address}: {exc}") from None


def iter_on_client(client, paths: Sequence[str], model_dir: Path, *, batch_files: int = BATCH_FILES,
                   runtime: str = "auto") -> Iterator[BatchResult]:
    """`iter_distributed` over a Dask client: retries lost batches, sizes the queue by its workers."""
    from distributed import as_completed

    workers = max(1, sum(client.nthreads().values()))

    def submit(fn, *args):
        # pure=False: a batch is submitted once per run; retries rerun it if its worker dies.
        return client.submit(fn, *args, retries=RETRIES, pure=False)

    def first_done(futures):
        return as_completed(futures)

    log.info("embedding %d files on %d Dask worker threads in batches of %d", len(paths), workers, batch_files)
    yield from iter_distributed(paths, model_dir, submit=submit, as_completed=first_done, workers=workers,
                                batch_files=batch_files, runtime=runtime)


def _single_thread_worker() -> None:
    """Each worker process runs its encoder on one thread (ONNX Runtime's, or torch's, set when the model is
    loaded, so a worker that runs ONNX never imports torch): the processes, not threads, share the cores."""
    global _worker_threads
    _worker_threads = 1


def iter_local(paths: Sequence[str], model_dir: Path, *, workers: int, batch_files: int = BATCH_FILES,
               runtime: str = "auto") -> Iterator[BatchResult]:
    """`iter_distributed` over a local pool of `workers` processes (spawned: torch and fork do not mix)."""
    import multiprocessing
    from concurrent.futures import ProcessPoolExecutor, as_completed

    if workers < 1:
        raise UsageError(f"workers must be >= 1, got {workers}")
    context = multiprocessing.get_context("spawn")
    with ProcessPoolExecutor(workers, mp_context=context, initializer=_single_thread_worker) as pool:
        yield from iter_distributed(paths, model_dir, submit=pool.submit, as_completed=as_completed,
                                    workers=workers, batch_files=batch_files, runtime=runtime)
