"""Contrastive self-supervised training of the encoder on the collection itself.

`train` learns from unlabeled images: two random views of one image are a
positive pair, the other images in the batch (and optionally a queue of earlier
embeddings) are negatives (SimCLR, Chen et al. 2020; MoCo queue, He et al. 2020).
Each image is decoded once, at a small size, into an in-memory cache; by default
whole batches of views are made in the training process with per-sample
parameters, and some pictures enter a batch as two non-overlapping regions that
are negatives of each other (`train_batches`, `batch_views`).

Fine-tuning a trained model from a person's verdicts lives in `fine_tune.py`.
"""

from __future__ import annotations

import hashlib
import io
import logging
import math
import os
import signal
import threading
import time
from contextlib import contextmanager
from dataclasses import asdict, dataclass, field, fields
from pathlib import Path
from typing import Any, Iterator, Sequence

import numpy as np
import torch
from PIL import Image

from ..core.errors import UsageError
from ..core.fsutil import atomic_write_bytes
from ..core.progress import Progress
from ..core.split_batch import SplitEncoder
from .embed import decode_files
from .encoder import DEFAULT_ARCH, Encoder, ProjectionHead, create_encoder
from .heldout import heldout_check
from .losses import koleo, nt_xent
from .model import save_model
from .train_batches import VIEW_MODES, decode_pictures, plan_batches, view_batches
from .views import ViewRecipe

log = logging.getLogger(__name__)

CHECKPOINT_FILE = "checkpoint.pt"
PARALLEL_MODES = ("split_batch", "intra_op")
MIN_TRAIN_IMAGES = 8
_LOSS_CURVE_POINTS = 200


@dataclass(frozen=True)
class TrainConfig:
    """Everything that defines a training run; saved in the model card and the checkpoint.

    Defaults follow benchmarks/results/train.md. The budget is whichever of
    `minutes` (training-loop wall time), `epochs` or `steps` runs out first.
    """

    arch: str = DEFAULT_ARCH
    dim: int = 128
    pooling: str = "gem"
    size: int = 96  # side of the training views in pixels
    # Side the trained model embeds at (the card's image_size); None = `size`. Training on smaller views
    # than the model later sees is cheaper per step, and a network trained on random crops tends to do
    # better tested at a somewhat larger side than it was trained at (Touvron et al. 2019, "Fixing the
    # train-test resolution discrepancy"). Measured on the quality benchmark (benchmarks/results/
    # train96-weather.md, runs A and B): views at 96 px gave 1.55x the steps of 128 px in the same 10 minutes
    # (260 against 168 images/s in one session) at the same µAP (0.983 against 0.980) and held-out recall@1
    # (0.964 against 0.968, within one standard error). A person who gives `size` alone (the CLI's --size)
    # gets views and model at that side (`from_options`).
    embed_size: int | None = 128
    # Measured (benchmarks/results/train.md): at an equal number of images, batch 32 with
    # twice the steps beat 64 and 128; temperature 0.05 matched or beat 0.1 and 0.2;
    # a queue without a momentum encoder hurt (its embeddings are stale), so it is off.
    batch_size: int = 32
    temperature: float = 0.05
    queue_len: int = 0  # extra negatives from earlier batches; 0 = in-batch negatives only
    koleo_weight: float = 0.0
    proj_dim: int = 128
    lr: float = 2e-3
    weight_decay: float = 0.05
    warmup_steps: int = 30
    minutes: float | None = 10.0
    epochs: float | None = None
    steps: int | None = None
    seed: int = 0
    # How views are made (indexer/learning/train_batches.py): "batched" in the training process, whole
    # batches at once with per-sample parameters; "per_image" by `workers` DataLoader processes.
    # Measured in benchmarks/results/train-views.md.
    views: str = "batched"
    # Share of a batch's entries that are two non-overlapping regions of one picture (hard
    # negatives of each other); batched views only.
    hard_negative_share: float = 0.25
    channels_last: bool = True  # NHWC activations for the convolutions (benchmarks/results/train-views.md)
    workers: int = 1  # DataLoader processes making views ("per_image" only)
    # How the model uses `threads` cores: "split_batch" runs each part of the batch in its own
    # thread with one torch thread (indexer/core/split_batch.py; robust when other processes share the
    # cores), "intra_op" gives torch that many threads for every operation.
    parallel: str = "split_batch"
    threads: int | None = None  # cores for the model; None = all cores less the view workers
    checkpoint_every_s: float = 180.0
    heldout: int = 256  # originals kept out of training for the check ...
    heldout_fraction: float = 0.2  # ... but at most this fraction of the readable images
    # A random sample of this many images is used when the collection is larger: the batched
    # views' cache holds one 192 x 192 x 3 square per image at 128 px (110 KB, 1.1 GB for
    # 10 000; the per-image cache ~83 KB), and a 10-minute CPU run sees a few tens of
    # thousands of views anyway (benchmarks/results/train.md).
    max_images: int = 10_000
    cache_side: float = 1.5  # images are decoded once with longest side cache_side * size
    recipe: ViewRecipe = field(default_factory=ViewRecipe)

    def to_dict(self) -> dict[str, Any]:
        values = asdict(self)
        values["recipe"] = self.recipe.to_dict()
        return values

    @classmethod
    def from_dict(cls, values: dict[str, Any]) -> "TrainConfig":
        known = {f.name for f in fields(cls)}
        unknown = set(values) - known
        if unknown:
            raise UsageError(f"unknown training settings: {', '.join(sorted(unknown))}")
        values = dict(values)
        if isinstance(values.get("recipe"), dict):
            values["recipe"] = ViewRecipe.from_dict(values["recipe"])
        return cls(**values)

    @classmethod
    def from_options(cls, **values) -> "TrainConfig":
        """A config from the options a person gave (None = not given, the default stays). An epoch
        budget given without minutes replaces the default time budget: then the same encoder comes
        out however busy the machine is."""
        values = {k: v for k, v in values.items() if v is not None}
        if "epochs" in values and "minutes" not in values:
            values["minutes"] = None
        if "size" in values and "embed_size" not in values:
            values["embed_size"] = None  # the side asked for is the model's too
        return cls(**values)

    @property
    def input_size(self) -> int:
        """The side the model embeds at once trained (and the held-out check uses)."""
        return self.embed_size or self.size

    def validate(self) -> None:
        checks = [
            (self.size >= 32, f"size must be >= 32 pixels, got {self.size}"),
            (self.embed_size is None or self.embed_size >= 32, f"embed_size must be >= 32 pixels, got {self.embed_size}"),
            (self.batch_size >= 2, f"batch_size must be >= 2, got {self.batch_size}"),
            (self.temperature > 0, f"temperature must be > 0, got {self.temperature}"),
            (self.queue_len >= 0, f"queue_len must be >= 0, got {self.queue_len}"),
            (self.lr > 0, f"lr must be > 0, got {self.lr}"),
            (self.workers >= 0, f"workers must be >= 0, got {self.workers}"),
            (self.views in VIEW_MODES, f"views must be one of {', '.join(VIEW_MODES)}, got {self.views!r}"),
            (0.0 <= self.hard_negative_share <= 1.0,
             f"hard_negative_share must be in [0, 1], got {self.hard_negative_share}"),
            (self.threads is None or self.threads >= 1, f"threads must be >= 1, got {self.threads}"),
            (self.parallel in PARALLEL_MODES,
             f"parallel must be one of {', '.join(PARALLEL_MODES)}, got {self.parallel!r}"),
            (0.0 <= self.heldout_fraction < 1.0, f"heldout_fraction must be in [0, 1), got {self.heldout_fraction}"),
            (self.cache_side >= 1.0, f"cache_side must be >= 1, got {self.cache_side}"),
            (
                any(b is not None for b in (self.minutes, self.epochs, self.steps)),
                "give a budget: minutes, epochs or steps",
            ),
        ]
        for ok, message in checks:
            if not ok:
                raise UsageError(message)
        self.recipe.validate()


@dataclass
class TrainResult:
    model_dir: Path
    version: str
    steps: int
    stopped_by: str  # "steps", "epochs" or "minutes"
    images_used: int  # images trained on (held-out ones excluded)
    skipped: dict[str, str]  # unreadable path -> reason
    final_loss: float
    images_per_s: float
    heldout: dict  # held-out check of the trained encoder
    heldout_random_init: dict  # the same check for the same architecture at random init


@contextmanager
def _deferred_interrupt() -> Iterator[dict]:
    """Turn Ctrl-C into a flag the loop checks between steps, so no checkpoint holds half a step."""
    flag = {"set": False}
    if threading.current_thread() is not threading.main_thread():
        yield flag
        return

    def remember(_signum, _frame):
        flag["set"] = True

    previous = signal.signal(signal.SIGINT, remember)
    try:
        yield flag
    finally:
        signal.signal(signal.SIGINT, previous)


def _init_modules(config: TrainConfig) -> tuple[Encoder, ProjectionHead]:
    torch.manual_seed(config.seed)
    encoder = create_encoder(config.arch, config.dim, config.pooling)
    head = ProjectionHead(config.dim, 4 * config.proj_dim, config.proj_dim)
    return encoder, head


def _lr_factor(config: TrainConfig, step: int, progress: float) -> float:
    """Linear warm-up, then cosine decay over the budget's progress (0..1), floored at 1 %."""
    if step < config.warmup_steps:
        return (step + 1) / config.warmup_steps
    return max(0.01, 0.5 * (1 + math.cos(math.pi * min(1.0, progress))))


def _progress(config: TrainConfig, step: int, elapsed: float, steps_per_epoch: int) -> float:
    parts = []
    if config.steps is not None:
        parts.append(step / config.steps)
    if config.epochs is not None:
        parts.append(step / (config.epochs * steps_per_epoch))
    if config.minutes is not None:
        parts.append(elapsed / (config.minutes * 60))
    return max(parts)


def _save_checkpoint(out_dir: Path, state: dict) -> None:
    buf = io.BytesIO()
    torch.save(state, buf)
    atomic_write_bytes(out_dir / CHECKPOINT_FILE, buf.getvalue())


def _load_checkpoint(out_dir: Path, config: TrainConfig) -> dict | None:
    path = out_dir / CHECKPOINT_FILE
    if not path.is_file():
        log.info("no checkpoint in %s; starting from scratch", out_dir)
        return None
    state = torch.load(path, map_location="cpu", weights_only=True)
    saved = state["config"]
    for key in ("arch", "dim", "pooling", "proj_dim", "size", "seed"):
        if saved[key] != getattr(config, key):
            raise UsageError(f"cannot resume: checkpoint has {key}={saved[key]!r}, this run asks for {getattr(config, key)!r}")
    return state


def _fingerprint(paths: Sequence[Path]) -> str:
    digest = hashlib.blake2b(digest_size=8)
    for p in paths:
        digest.update(str(p).encode("utf-8", "surrogateescape") + b"\0")
    return digest.hexdigest()


def sample_curve(losses: list[float]) -> list[list[float]]:
    """(step, mean loss) at most _LOSS_CURVE_POINTS points, each the mean of its window."""
    if not losses:
        return []
    edges = np.unique(np.linspace(0, len(losses), min(len(losses), _LOSS_CURVE_POINTS) + 1).astype(int))
    return [[int(hi), float(np.mean(losses[lo:hi]))] for lo, hi in zip(edges[:-1], edges[1:])]


def split_heldout(paths: Sequence[Path], config: TrainConfig) -> tuple[list[Path], list[Path]]:
    """(training paths, held-out paths): a seeded random `heldout_fraction` (at most `heldout`) is kept out."""
    n_held = min(config.heldout, int(len(paths) * config.heldout_fraction))
    order = np.random.default_rng(config.seed).permutation(len(paths))
    return [paths[i] for i in np.sort(order[n_held:])], [paths[i] for i in np.sort(order[:n_held])]


def _set_threads(config: TrainConfig) -> int:
    """Set torch's thread count; returns the number of batch parts run in parallel threads (1 = none).

    Oversubscribing the cores (view workers + model threads) slowed training
    several-fold in our measurements (benchmarks/results/train.md).
    """
    workers = config.workers if config.views == "per_image" else 0
    threads = max(1, config.threads or (os.cpu_count() or 1) - workers)
    parts = threads if config.parallel == "split_batch" else 1
    torch.set_num_threads(1 if parts > 1 else threads)
    return parts


def train(
    images: Sequence[Path], out_dir: Path, config: TrainConfig, *, resume: bool = False, progress: bool = True
) -> TrainResult:
    """Train an encoder on `images` and save it (weights + card) in `out_dir`.

    Unreadable images are skipped and counted. A checkpoint is written every
    `checkpoint_every_s` seconds and at the end; `resume=True` continues from it.
    """
    config.validate()
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    parts = _set_threads(config)
    started = time.monotonic()
    paths = [Path(p) for p in images]
    if len(paths) > config.max_images:
        pick = np.sort(np.random.default_rng(config.seed).choice(len(paths), config.max_images, replace=False))
        log.info("using a random sample of %d of %d images", config.max_images, len(paths))
        paths = [paths[i] for i in pick]
    train_paths, held_paths = split_heldout(paths, config)
    cache, kept, skipped = decode_pictures(train_paths, config.views, round(config.cache_side * config.size),
                                           os.cpu_count() or 1)
    held_images, held_skipped = _decode_heldout(held_paths, config)
    skipped.update(held_skipped)
    log.info("decoded %d images (%d unreadable) in %.1f s", len(kept) + len(held_images), len(skipped),
             time.monotonic() - started)
    if len(kept) < MIN_TRAIN_IMAGES:
        raise UsageError(f"need at least {MIN_TRAIN_IMAGES} readable images to train, got {len(kept)}")

    encoder, head = _init_modules(config)
    run = _run_loop(cache, encoder, head, config, out_dir, resume=resume, progress=progress,
                    fingerprint=_fingerprint(kept), parts=parts)
    heldout, heldout_random = _compare_with_random_init(encoder, held_images, config)
    card = _model_card(config, run, images_given=len(images), trained_on=kept, held_out=len(held_images),
                       held_paths=held_paths,
                       unreadable=len(skipped), heldout=(heldout, heldout_random), wall_s=time.monotonic() - started)
    version = save_model(out_dir, encoder, card)
    losses = run["losses"]
    return TrainResult(out_dir, version, run["step"], run["stopped_by"], len(kept), skipped,
                       float(np.mean(losses[-20:])) if losses else float("nan"), run["images_per_s"],
                       heldout, heldout_random)


def _model_card(config: TrainConfig, run: dict, *, images_given: int, trained_on: list[Path], held_out: int,
                held_paths: Sequence[Path],
                unreadable: int, heldout: tuple[dict, dict], wall_s: float) -> dict:
    """What `save_model` stores about a training run beside the weights."""
    return {
        "arch": config.arch,
        "image_size": config.input_size,
        "train_config": config.to_dict(),
        "recipe": config.recipe.to_dict(),
        "loss": {"name": "nt_xent", "temperature": config.temperature, "queue_len": config.queue_len,
                 "koleo_weight": config.koleo_weight, "projection_head": [config.dim, 4 * config.proj_dim, config.proj_dim]},
        "data": {"images_given": images_given, "unreadable": unreadable, "trained_on": len(trained_on),
                 "held_out": held_out, "fingerprint": _fingerprint(trained_on),
                 # Calibration draws its synthetic positives from these originals first.
                 "heldout_paths": [str(p) for p in held_paths]},
        "steps": run["step"],
        "epochs": round(run["step"] * run["pictures_per_step"] / len(trained_on), 3),
        "stopped_by": run["stopped_by"],
        "loss_curve": sample_curve(run["losses"]),
        "train_seconds": round(run["elapsed_s"], 1),
        "images_per_s": round(run["images_per_s"], 1),
        "wall_seconds": round(wall_s, 1),
        "heldout": {"trained": heldout[0], "random_init": heldout[1]},
    }


# Held-out originals are decoded larger than the training cache so that even the
# strongest "resize" edit (x0.4) leaves the shorter side of a 4:3 copy above the
# input size, as a resized full-size file would be; otherwise the check would
# mostly test upscaling. Memory: 256 originals at 512 px are about 150 MB.
HELDOUT_DECODE_FACTOR = 4


def _decode_heldout(paths: list[Path], config: TrainConfig) -> tuple[list[Image.Image], dict[str, str]]:
    images, skipped = [], {}
    for index, pixels, error in decode_files(paths, HELDOUT_DECODE_FACTOR * config.input_size, os.cpu_count() or 1):
        if error is None:
            images.append(Image.fromarray(pixels))
        else:
            skipped[str(paths[index])] = error
    return images, skipped


def _compare_with_random_init(encoder: Encoder, held_images: list[Image.Image], config: TrainConfig) -> tuple[dict, dict]:
    if len(held_images) < 2:
        log.warning("too few images to hold out any for the held-out check")
        return {}, {}
    trained = heldout_check(encoder, held_images, config.seed, config.input_size)
    random_init, _ = _init_modules(config)
    baseline = heldout_check(random_init, held_images, config.seed, config.input_size)
    log.info(
        "held-out check on %d originals: recall@1 %.3f (random init %.3f), mean rank %.2f (random init %.2f)",
        trained["n"], trained["recall_at_1"], baseline["recall_at_1"], trained["mean_rank"], baseline["mean_rank"],
    )
    return trained, baseline


def _train_step(
    encoder: Encoder, head: ProjectionHead, optimizer: torch.optim.Optimizer,
    v1: torch.Tensor, v2: torch.Tensor, queue: torch.Tensor, config: TrainConfig, lr: float,
    split: SplitEncoder | None = None,
) -> tuple[float, torch.Tensor]:
    """One AdamW step on NT-Xent of the projected views (+ KoLeo on the descriptors); returns (loss, queue).

    With `split`, the encoder runs on parts of the batch in parallel threads; the
    head and the loss run here on the joined descriptors, whose gradients then
    go back to the threads.
    """
    for group in optimizer.param_groups:
        group["lr"] = lr
    x = torch.cat([v1, v2])
    if config.channels_last:
        x = x.contiguous(memory_format=torch.channels_last)
    if split is None:
        h = encoder.forward_head(encoder.forward_features(x), normalize=False)
    else:
        parts = split.forward(x.chunk(len(split.replicas)))
        leaves = [part.detach().requires_grad_() for part in parts]
        h = torch.cat(leaves)
    z1, z2 = head(h).chunk(2)
    loss = nt_xent(z1, z2, config.temperature, queue if config.queue_len else None)
    if config.koleo_weight:
        h1, h2 = h.chunk(2)
        loss = loss + config.koleo_weight * 0.5 * (koleo(h1) + koleo(h2))
    optimizer.zero_grad(set_to_none=True)
    loss.backward()
    if split is not None:
        split.backward(parts, [leaf.grad for leaf in leaves])
        split.sync_buffers()
    optimizer.step()
    if config.queue_len:
        queue = torch.cat([torch.nn.functional.normalize(z1.detach(), dim=1), queue])[: config.queue_len]
    return float(loss.item()), queue


def _start_state(encoder: Encoder, head: ProjectionHead, optimizer: torch.optim.Optimizer, config: TrainConfig,
                 out_dir: Path, resume: bool, fingerprint: str) -> dict:
    """step, elapsed_s, losses and queue: from the checkpoint (weights and optimizer loaded too) or fresh."""
    state = {"step": 0, "elapsed_s": 0.0, "losses": [], "queue": torch.zeros(0, config.proj_dim)}
    saved = _load_checkpoint(out_dir, config) if resume else None
    if saved is not None:
        encoder.load_state_dict(saved["encoder"])
        head.load_state_dict(saved["head"])
        optimizer.load_state_dict(saved["optimizer"])
        state.update(step=saved["step"], elapsed_s=saved["elapsed_s"], losses=list(saved["losses"]),
                     queue=saved["queue"])
        if saved.get("fingerprint") != fingerprint:
            log.warning("resuming on a different set of images than the checkpoint was trained on")
        log.info("resuming from step %d (%.0f s trained)", state["step"], state["elapsed_s"])
    return state


def _stop_reason(config: TrainConfig, step: int, elapsed: float, steps_per_epoch: int) -> str | None:
    if config.steps is not None and step >= config.steps:
        return "steps"
    if config.epochs is not None and step >= config.epochs * steps_per_epoch:
        return "epochs"
    if config.minutes is not None and elapsed >= config.minutes * 60:
        return "minutes"
    return None


def _run_loop(cache, encoder: Encoder, head: ProjectionHead, config: TrainConfig, out_dir: Path, *,
              resume: bool, progress: bool, fingerprint: str, parts: int = 1) -> dict:
    """The optimisation loop; returns step, losses, elapsed_s, images_per_s, stopped_by, pictures_per_step.

    images_per_s counts batch entries (view pairs through the model) per second of this session.
    """
    if config.channels_last:
        encoder.to(memory_format=torch.channels_last)
    params = list(encoder.parameters()) + list(head.parameters())
    optimizer = torch.optim.AdamW(params, lr=config.lr, weight_decay=config.weight_decay)
    state = _start_state(encoder, head, optimizer, config, out_dir, resume, fingerprint)
    plan = plan_batches(len(cache), config.batch_size, config.hard_negative_share, config.views)
    batches, sampler = view_batches(cache, plan, config.recipe, config.size, config.seed, state["step"],
                                    config.workers, threads=parts)

    def snapshot() -> dict:
        return {**state, "fingerprint": fingerprint, "config": config.to_dict(), "encoder": encoder.state_dict(),
                "head": head.state_dict(), "optimizer": optimizer.state_dict()}

    encoder.train()
    head.train()
    split = SplitEncoder(encoder, parts) if parts > 1 else None
    bar = Progress(config.steps, "train", enabled=progress, unit="step", initial=state["step"], every_s=30.0)
    elapsed0, seen = state["elapsed_s"], 0
    session_start = last_checkpoint = time.monotonic()
    try:
        with _deferred_interrupt() as interrupted:
            while (stopped_by := _stop_reason(config, state["step"], state["elapsed_s"],
                                              sampler.steps_per_epoch)) is None:
                if interrupted["set"]:
                    log.warning("interrupted at step %d; checkpoint saved (resume with resume=True)", state["step"])
                    _save_checkpoint(out_dir, snapshot())
                    raise KeyboardInterrupt
                v1, v2 = next(batches)
                step = state["step"]
                lr = config.lr * _lr_factor(config, step, _progress(config, step, state["elapsed_s"],
                                                                    sampler.steps_per_epoch))
                loss, state["queue"] = _train_step(encoder, head, optimizer, v1, v2, state["queue"], config, lr, split)
                state["step"], seen = step + 1, seen + len(v1)
                state["losses"].append(loss)
                now = time.monotonic()
                state["elapsed_s"] = elapsed0 + (now - session_start)
                bar.update(1, loss=f"{loss:.3f}", images_a_second=f"{seen / max(now - session_start, 1e-9):.0f}")
                if now - last_checkpoint >= config.checkpoint_every_s:
                    _save_checkpoint(out_dir, snapshot())
                    last_checkpoint = now
    finally:
        bar.close()
        batches.close()  # shuts view worker processes down, if any
        if split is not None:
            split.close()
    _save_checkpoint(out_dir, snapshot())
    images_per_s = seen / max(time.monotonic() - session_start, 1e-9)
    log.info("trained %d steps (%s budget reached), %.1f images/s", state["step"], stopped_by, images_per_s)
    encoder.to(memory_format=torch.contiguous_format)
    encoder.eval()
    return {"step": state["step"], "losses": state["losses"], "elapsed_s": state["elapsed_s"],
            "images_per_s": images_per_s, "stopped_by": stopped_by, "pictures_per_step": plan.pictures}
