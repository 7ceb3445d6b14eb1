"""A trained model on disk: weights plus a JSON model card.

Layout of a model folder::

    model.pt    torch.save(state_dict) of the Encoder, loaded with weights_only=True
    card.json   how it was built and how well it did (see `save_model`)
    model.onnx  the same encoder exported for ONNX Runtime, with model.onnx.json (indexer/learning/runtime.py)

The version id, ``m-YYYYMMDD-HHMMSS-<8 hex of the weights' BLAKE2b>``, names a
model everywhere (catalog, index, HTTP). The weights hash is also stored in the
card and checked on load, so a card and weights from different runs are caught.
"""

from __future__ import annotations

import hashlib
import io
import json
import logging
import platform
from datetime import datetime, timezone
from importlib import metadata
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
import PIL

from ..core.errors import NearsightError, NotReadyError
from ..core.fsutil import atomic_write_bytes, atomic_write_text

if TYPE_CHECKING:
    from .encoder import Encoder

log = logging.getLogger(__name__)
# PyTorch is imported only by the functions that need it: reading a card (`read_card`) must stay cheap,
# because a query that runs on ONNX Runtime (indexer/learning/runtime.py) never imports PyTorch at all.

WEIGHTS_FILE = "model.pt"
CARD_FILE = "card.json"
CARD_FORMAT = 1


def library_versions() -> dict[str, str]:
    import torch

    return {
        "python": platform.python_version(),
        "torch": torch.__version__,
        "torchvision": metadata.version("torchvision"),  # not imported: that costs ~1.8 s of start-up
        "numpy": np.__version__,
        "pillow": PIL.__version__,
    }


def _weights_bytes(encoder: "Encoder") -> bytes:
    import torch

    buf = io.BytesIO()
    torch.save(encoder.state_dict(), buf)
    return buf.getvalue()


def save_model(model_dir: Path, encoder: "Encoder", card: dict) -> str:
    """Write weights and card atomically; returns the new version id.

    The card gets, on top of what the caller gives (training config, recipe,
    loss curve, held-out results, ...): version, created, architecture, dim,
    pooling, weights hash and library versions.
    """
    model_dir = Path(model_dir)
    data = _weights_bytes(encoder)
    digest = hashlib.blake2b(data, digest_size=16).hexdigest()
    now = datetime.now(timezone.utc)
    version = f"m-{now:%Y%m%d-%H%M%S}-{digest[:8]}"
    full_card = {
        **card,
        "format": CARD_FORMAT,
        "version": version,
        "created": now.isoformat(timespec="seconds"),
        "arch": card.get("arch"),
        "dim": encoder.dim,
        "pooling": encoder.pooling,
        "input_norm": encoder.input_norm,
        "classic": encoder.classic,
        "grey_view": encoder.grey_view,
        "weights_blake2b": digest,
        "libraries": library_versions(),
    }
    if full_card["arch"] is None:
        raise NearsightError("the model card must name the encoder architecture ('arch')")
    atomic_write_bytes(model_dir / WEIGHTS_FILE, data)
    atomic_write_text(model_dir / CARD_FILE, json.dumps(full_card, indent=2, sort_keys=True) + "\n")
    from .runtime import write_onnx  # the same encoder for ONNX Runtime (indexer/learning/runtime.py)

    write_onnx(model_dir, encoder, full_card)
    log.info("saved model %s to %s", version, model_dir)
    return version


def read_card(model_dir: Path) -> dict:
    path = Path(model_dir) / CARD_FILE
    if not path.is_file():
        raise NotReadyError(f"no trained model in {model_dir} (missing {CARD_FILE}); run `nearsight train` first")
    try:
        return json.loads(path.read_text("utf-8"))
    except (OSError, ValueError) as exc:
        raise NearsightError(f"cannot read model card {path}: {exc}") from exc


def load_model(model_dir: Path) -> tuple["Encoder", dict]:
    """Rebuild the encoder from the card and load its weights (no arbitrary unpickling); eval mode."""
    import torch

    from .encoder import create_encoder

    model_dir = Path(model_dir)
    card = read_card(model_dir)
    path = model_dir / WEIGHTS_FILE
    if not path.is_file():
        raise NotReadyError(f"model card found but weights missing: {path}")
    data = path.read_bytes()
    digest = hashlib.blake2b(data, digest_size=16).hexdigest()
    if digest != card.get("weights_blake2b"):
        raise NearsightError(f"{path} does not match {CARD_FILE} (weights hash differs); retrain or restore the model folder")
    # Cards written before input standardisation and classical descriptors existed name neither.
    encoder = create_encoder(card["arch"], dim=int(card["dim"]), pooling=card["pooling"],
                             input_norm=card.get("input_norm", "imagenet"), classic=card.get("classic"),
                             grey_view=bool(card.get("grey_view", False)))
    try:
        state = torch.load(io.BytesIO(data), map_location="cpu", weights_only=True)
        encoder.load_state_dict(state)
    except Exception as exc:  # torch raises several types for corrupt or mismatched files
        raise NearsightError(f"cannot load weights {path}: {exc}") from exc
    encoder.eval()
    return encoder, card
