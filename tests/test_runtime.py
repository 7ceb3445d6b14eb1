"""The encoder run by ONNX Runtime (indexer/learning/runtime.py): the same vectors as PyTorch on scikit-image's photos,
never a file that does not belong to the weights, and a query answered without importing PyTorch."""

import json

import numpy as np
import pytest
from PIL import Image, ImageEnhance

from nearsight.indexer.learning import runtime
from nearsight.indexer.learning.embed import embed_images
from nearsight.indexer.learning.encoder import create_encoder
from nearsight.indexer.core.errors import NotReadyError, UsageError
from nearsight.indexer.learning.model import load_model, save_model
from tests.subprocess_cli import run_fresh

pytest.importorskip("onnxruntime")

PHOTOS = ("astronaut", "coffee", "chelsea", "rocket", "camera", "brick", "moon", "page")


def _photos():
    import skimage.data

    return [Image.fromarray(getattr(skimage.data, name)()).convert("RGB") for name in PHOTOS]


@pytest.fixture(scope="module")
def model_dir(tmp_path_factory):
    """A randomly initialised resnet_narrow (the default architecture) saved as training saves it."""
    import torch

    torch.manual_seed(0)
    folder = tmp_path_factory.mktemp("model")
    save_model(folder, create_encoder("resnet_narrow", 128), {"arch": "resnet_narrow", "image_size": 96})
    return folder


def test_saving_a_model_exports_it_and_records_which_weights(model_dir):
    record = json.loads((model_dir / runtime.ONNX_RECORD).read_text())
    card = json.loads((model_dir / "card.json").read_text())
    assert record["weights_blake2b"] == card["weights_blake2b"] and (model_dir / runtime.ONNX_FILE).stat().st_size
    encoder, _ = runtime.load_encoder(model_dir)
    assert isinstance(encoder, runtime.OnnxEncoder) and encoder.out_dim == 128 + 63  # learned + dct8


def test_onnx_runtime_gives_pytorchs_vectors_and_the_same_nearest_photo(model_dir):
    """Reference: the PyTorch encoder itself. Tolerance 1e-3 per component as the issue asks (the two
    differ by float rounding in a different order of operations; measured about 1e-6)."""
    photos = _photos()
    # Edited copies: a crop of 80 % of the area, darker and re-sized, as a query would come.
    copies = [ImageEnhance.Brightness(p.crop((0, 0, int(p.width * 0.9), int(p.height * 0.9)))).enhance(0.7)
              .resize((200, 160)) for p in photos]
    torch_encoder, card = load_model(model_dir)
    onnx_encoder, _ = runtime.load_encoder(model_dir, "onnx")
    size = int(card["image_size"])
    for images in (photos, copies):
        a = embed_images(torch_encoder, images, size, batch_size=3)
        b = embed_images(onnx_encoder, images, size, batch_size=3)
        assert a.shape == b.shape and a.dtype == b.dtype == np.float32
        np.testing.assert_allclose(b, a, atol=1e-3)
        np.testing.assert_allclose(np.linalg.norm(b, axis=1), 1.0, atol=1e-5)
    ranked = {}
    for name, encoder in (("torch", torch_encoder), ("onnx", onnx_encoder)):
        xb, xq = embed_images(encoder, photos, size), embed_images(encoder, copies, size)
        ranked[name] = np.argmax(xq @ xb.T, axis=1)
    np.testing.assert_array_equal(ranked["onnx"], ranked["torch"])


def test_a_file_that_does_not_belong_to_the_weights_is_never_used(model_dir, tmp_path, caplog):
    import shutil

    folder = tmp_path / "copy"
    shutil.copytree(model_dir, folder)
    data = (folder / runtime.ONNX_FILE).read_bytes()
    (folder / runtime.ONNX_FILE).write_bytes(data[:-10] + bytes(10))  # damaged
    encoder, _ = runtime.load_encoder(folder)
    assert not isinstance(encoder, runtime.OnnxEncoder) and "does not match" in caplog.text
    with pytest.raises(NotReadyError, match="runtime = onnx"):
        runtime.load_encoder(folder, "onnx")
    (folder / runtime.ONNX_FILE).write_bytes(data)
    record = json.loads((folder / runtime.ONNX_RECORD).read_text())
    (folder / runtime.ONNX_RECORD).write_text(json.dumps({**record, "weights_blake2b": "0" * 32}))
    assert not isinstance(runtime.load_encoder(folder)[0], runtime.OnnxEncoder)
    (folder / runtime.ONNX_RECORD).unlink()
    assert not isinstance(runtime.load_encoder(folder)[0], runtime.OnnxEncoder)
    # A model saved before the export existed gets it from ensure_onnx, and then runs on ONNX Runtime.
    assert runtime.ensure_onnx(folder)
    assert isinstance(runtime.load_encoder(folder)[0], runtime.OnnxEncoder)
    assert not isinstance(runtime.load_encoder(folder, "torch")[0], runtime.OnnxEncoder)
    with pytest.raises(UsageError, match="runtime"):
        runtime.load_encoder(folder, "gpu")


def test_a_one_image_query_runs_without_importing_pytorch(tmp_path):
    """`nearsight similar` on a store indexed by the real pipeline: the subprocess's own sys.modules."""
    from nearsight.indexer.building.pipeline import run_index
    from nearsight.indexer.core.settings import load_settings
    from nearsight.indexer.storage.store import Store
    from tests.test_pipeline import TINY, _scene

    photos = tmp_path / "photos"
    photos.mkdir()
    for i in range(12):
        _scene(photos / f"{i:02d}.jpg", i)
    with Store.open(tmp_path / "store", create=True, settings=load_settings(environ={})) as store:
        run_index(store, [photos], progress=False, train_config=TINY)
    out = run_fresh(["similar", "--json", "--store", tmp_path / "store", photos / "03.jpg"], ("torch", "onnxruntime"))
    assert out["code"] == 0 and out["loaded"] == ["onnxruntime"]
    assert "03.jpg" in out["stdout"]


def test_the_runtime_s_input_is_torchvision_s_normalisation_of_the_pixels():
    # `inputs.standardised` looks each 8-bit level up in a table computed once. Reference: torchvision's
    # transforms.v2 ToDtype(float32, scale=True) then Normalize with the same channel statistics, on every
    # level of every channel and on scikit-image's photos.
    import torch
    from torchvision.transforms import v2

    from nearsight.indexer.learning.inputs import IMAGENET_MEAN, IMAGENET_STD, square_batch, standardised

    reference = v2.Compose([v2.ToDtype(torch.float32, scale=True), v2.Normalize(IMAGENET_MEAN, IMAGENET_STD)])
    levels = np.repeat(np.arange(256, dtype=np.uint8), 3).reshape(1, 16, 16, 3)
    photos = square_batch(_photos(), 96)
    many = np.concatenate([photos] * 4)  # PARALLEL_BATCH or more: a share of the rows a core
    for batch in (levels, photos, many):
        expected = reference(torch.from_numpy(batch).permute(0, 3, 1, 2).contiguous()).numpy()
        ours = standardised(batch)
        assert ours.dtype == np.float32 and ours.shape == expected.shape
        assert np.abs(ours - expected).max() <= 1e-6
