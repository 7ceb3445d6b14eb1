"""The trained encoder run by ONNX Runtime: answering without importing PyTorch.

Importing PyTorch costs one and a half to three seconds on this project's machines, most of a
one-image `nearsight similar` (benchmarks/results/startup.md). Every model folder therefore also
holds the encoder exported to ONNX (`model.onnx`, written when the model is saved, or by the next
`nearsight index` for a model saved before), and queries, the service and the embedding stage run it
with ONNX Runtime when it is installed. Its vectors equal PyTorch's to about 2e-5
(tests/test_runtime.py); the file is tied to the weights it was exported from (`model.onnx.json`: its
own BLAKE2b and the weights' hash from the card), so a file that does not match is never used.

`load_encoder` chooses: the setting `runtime` = "auto" (ONNX Runtime when the file and the library are
there, else PyTorch), "onnx" (refuse to go on without it) or "torch".
"""

from __future__ import annotations

import hashlib
import io
import json
import logging
import warnings
from pathlib import Path

import numpy as np

from ..core.errors import NotReadyError, UsageError
from ..core.fsutil import atomic_write_bytes, atomic_write_text
from ..core.settings import RUNTIMES

log = logging.getLogger(__name__)

ONNX_FILE = "model.onnx"
ONNX_RECORD = "model.onnx.json"
OPSET = 17  # ONNX opset of the export; every operator the encoder uses exists in it


class OnnxEncoder:
    """The encoder's `descriptor` as an ONNX Runtime session: float32 (n, 3, s, s) in, (n, out_dim) out."""

    training = False

    def __init__(self, data: bytes, card: dict, threads: int | None = None):
        import onnxruntime as ort

        from ..core.cores import usable_cores

        options = ort.SessionOptions()
        options.intra_op_num_threads = threads or usable_cores()
        options.inter_op_num_threads = 1
        options.log_severity_level = 3  # warnings about unused initialisers are not the user's business
        # Between two runs the session's threads would spin waiting for work, on the cores that then resize
        # the next batch, decode and verify: calibration, which alternates the two, took 32.0-32.8 s against
        # 33.6-35.1 with spinning (three pairs, benchmarks/results/naive.md).
        options.add_session_config_entry("session.intra_op.allow_spinning", "0")
        self.session = ort.InferenceSession(data, options, providers=["CPUExecutionProvider"])
        self.input_name = self.session.get_inputs()[0].name
        self.dim = int(card["dim"])
        self.out_dim = self.dim + _classic_dim(card)

    def __call__(self, x: np.ndarray) -> np.ndarray:
        return self.session.run(None, {self.input_name: np.ascontiguousarray(x, np.float32)})[0]


def _classic_dim(card: dict) -> int:
    from .classic import classic_dim

    return classic_dim(card.get("classic"))


def export_onnx(encoder, size: int) -> bytes:
    """The encoder's `descriptor` exported to ONNX (PyTorch's TorchScript-based exporter), batch size free."""
    import torch

    was_training = encoder.training
    encoder.eval()
    buf = io.BytesIO()
    try:
        with warnings.catch_warnings():
            # The tracer notes that the fixed channel statistics become constants: they are constants.
            warnings.simplefilter("ignore", torch.jit.TracerWarning)
            warnings.simplefilter("ignore", DeprecationWarning)  # the TorchScript-based exporter's notice
            torch.onnx.export(encoder, (torch.zeros(2, 3, size, size),), buf, dynamo=False, input_names=["x"],
                              output_names=["descriptor"], dynamic_axes={"x": {0: "n"}, "descriptor": {0: "n"}},
                              opset_version=OPSET)
    finally:
        encoder.train(was_training)
    return buf.getvalue()


def write_onnx(model_dir: Path, encoder, card: dict) -> bool:
    """Export `encoder` into `model_dir` beside its weights; False (and a log line) when this
    installation cannot export (no `onnx` package), so the model is still saved and runs on PyTorch."""
    try:
        data = export_onnx(encoder, int(card["image_size"]))
    except Exception as exc:  # the exporter raises many kinds (missing package, an unsupported operator)
        log.info("model not exported to ONNX (%s: %s); it will run on PyTorch", type(exc).__name__, exc)
        return False
    model_dir = Path(model_dir)
    atomic_write_bytes(model_dir / ONNX_FILE, data)
    record = {"blake2b": hashlib.blake2b(data, digest_size=16).hexdigest(),
              "weights_blake2b": card["weights_blake2b"], "opset": OPSET}
    atomic_write_text(model_dir / ONNX_RECORD, json.dumps(record, indent=2, sort_keys=True) + "\n")
    return True


def ensure_onnx(model_dir: Path) -> bool:
    """Give a model saved before the export existed its ONNX file (PyTorch is imported for it)."""
    from .model import load_model

    if _onnx_bytes(Path(model_dir), _card(model_dir)) is not None:
        return True
    encoder, card = load_model(model_dir)
    return write_onnx(model_dir, encoder, card)


def _card(model_dir: Path) -> dict:
    from .model import read_card

    return read_card(model_dir)


def _onnx_bytes(model_dir: Path, card: dict) -> bytes | None:
    """The exported file's bytes when it is there and belongs to these weights, else None."""
    try:
        record = json.loads((model_dir / ONNX_RECORD).read_text("utf-8"))
        data = (model_dir / ONNX_FILE).read_bytes()
    except (OSError, ValueError):
        return None
    if record.get("weights_blake2b") != card.get("weights_blake2b"):
        log.warning("%s was exported from other weights; using PyTorch", model_dir / ONNX_FILE)
        return None
    if hashlib.blake2b(data, digest_size=16).hexdigest() != record.get("blake2b"):
        log.warning("%s does not match its record (damaged?); using PyTorch", model_dir / ONNX_FILE)
        return None
    return data


def onnx_available() -> bool:
    import importlib.util

    return importlib.util.find_spec("onnxruntime") is not None


def load_encoder(model_dir: Path, runtime: str = "auto", threads: int | None = None):
    """(encoder, card) for embedding: an OnnxEncoder when `runtime` allows and the exported file is usable,
    else the PyTorch encoder (`model.load_model`)."""
    if runtime not in RUNTIMES:
        raise UsageError(f"runtime must be one of {', '.join(RUNTIMES)}, not {runtime!r}")
    model_dir = Path(model_dir)
    if runtime != "torch":
        card = _card(model_dir)
        data = _onnx_bytes(model_dir, card) if onnx_available() else None
        if data is not None:
            try:
                return OnnxEncoder(data, card, threads), card
            except Exception as exc:  # ONNX Runtime raises its own kinds for a file it cannot load
                log.warning("ONNX Runtime cannot load %s (%s); using PyTorch", model_dir / ONNX_FILE, exc)
        if runtime == "onnx":
            raise NotReadyError(f"runtime = onnx, but {model_dir} has no usable {ONNX_FILE} or onnxruntime is "
                                "not installed: install onnx and onnxruntime and run `nearsight index` to export "
                                "the model, or set runtime = auto")
    from .model import load_model

    return load_model(model_dir)
