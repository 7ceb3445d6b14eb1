"""The image encoder: a compact, randomly initialised CNN trained on the collection.

Reads top-down, timm style: pooling blocks, backbones, the `Encoder`, the
training-only `ProjectionHead`, then the `create_encoder` factory and the one
`preprocess` used by training checks, the held-out check and embedding.

Interface: ``forward_features(x)`` returns the feature map, ``forward_head(f)``
pools and projects it, ``descriptor(x)`` / ``forward(x)`` return the
L2-normalised embedding of size ``dim``.
"""

from __future__ import annotations

from typing import Callable, Sequence

import torch
import torch.nn.functional as F
from PIL import Image
from torch import nn

from ..core.errors import UsageError
from .classic import DEFAULT_CLASSIC, check_classic, classic_descriptor, classic_dim, luma
from .inputs import IMAGENET_MEAN, IMAGENET_STD, square_batch

DEFAULT_ARCH = "resnet_narrow"
POOLINGS = ("gem", "avg")
# What the backbone sees: "imagenet" is the fixed channel standardisation alone (models
# saved before input standardisation existed); "luma" also standardises each image by its
# own mean and spread of luminance, so brightness and contrast changes barely move the input;
# "centred" takes each channel's own mean instead of the luma's, so a contrast change towards
# each channel's mean (ImageNet-C's contrast) or a colour cast moves it no more (standardise).
# "centred" is an option, not the default: on the quality benchmark it cost crops' recall@1
# (0.914 -> 0.877) and let 8 of 804 queries without a match be flagged (0 with "luma");
# benchmarks/results/quality-centred.md. "grey" feeds the standardised luminance alone (in each of
# the three input channels), so that a copy recoloured, toned or turned grey gives the backbone
# nearly the same input as its original.
INPUT_NORMS = ("imagenet", "luma", "centred", "grey")
DEFAULT_INPUT_NORM = "luma"
# The stored learned vector of a model with `grey_view`: the sum of what the backbone makes of the
# picture and of its luminance alone (standardise(x, "grey")), normalised. The picture in colour
# keeps what colour tells about small crops and fog; the grey pass is what a recoloured, toned or
# heavily re-compressed copy still shares with its original. It costs a second backbone pass per
# picture; training is unchanged. Off: on the quality benchmark it lifted recoloured and JPEG copies (hue-180 µAP
# 0.778 -> 0.963) and lost as much on small crops and fog (crop-80 0.781 -> 0.717), overall µAP 0.965 -> 0.964
# (benchmarks/results/quality-greyview.md).
DEFAULT_GREY_VIEW = False


class GeM(nn.Module):
    """Generalised-mean pooling (Radenović, Tolias, Chum 2018) with a learnable exponent.

    p = 1 is average pooling and p -> inf approaches max pooling; p starts at 3
    as in the paper. Inputs are clamped at `eps` because x ** p needs x > 0.
    """

    def __init__(self, p: float = 3.0, eps: float = 1e-6):
        super().__init__()
        self.p = nn.Parameter(torch.tensor(float(p)))
        self.eps = eps

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        p = self.p.clamp(min=1.0)
        return x.clamp(min=self.eps).pow(p).mean(dim=(-2, -1)).pow(1.0 / p)

    def extra_repr(self) -> str:
        return f"p={self.p.item():.3f}, eps={self.eps}"


class AvgPool(nn.Module):
    """Global average pooling, (B, C, H, W) -> (B, C)."""

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return x.mean(dim=(-2, -1))


def _conv_bn_relu(c_in: int, c_out: int, stride: int) -> nn.Sequential:
    return nn.Sequential(
        nn.Conv2d(c_in, c_out, 3, stride=stride, padding=1, bias=False),
        nn.BatchNorm2d(c_out),
        nn.ReLU(inplace=True),
    )


def _tiny_backbone() -> tuple[nn.Module, int]:
    """Four strided 3x3 convolutions (16-32-64-128 channels); for tests, trains in seconds."""
    widths = (16, 32, 64, 128)
    layers, c_in = [], 3
    for width in widths:
        layers.append(_conv_bn_relu(c_in, width, stride=2))
        c_in = width
    return nn.Sequential(*layers), widths[-1]


class BasicBlock(nn.Module):
    """The two-convolution residual block of ResNet-18/34 (He et al. 2016): 3x3 conv, BN, ReLU,
    3x3 conv, BN, plus the input (through `downsample` when the shape changes), then ReLU.

    Written here, with the attribute names of torchvision's `BasicBlock` so that a saved model's
    weights load into either, because importing torchvision costs about 1.8 s of every start-up
    (its `ops` import `torch._dynamo`), most of a `nearsight similar` that answers in under a second
    once loaded. tests/test_descriptor.py checks it against torchvision's block."""

    def __init__(self, c_in: int, width: int, stride: int = 1, downsample: nn.Module | None = None):
        super().__init__()
        self.conv1 = nn.Conv2d(c_in, width, 3, stride=stride, padding=1, bias=False)
        self.bn1 = nn.BatchNorm2d(width)
        self.relu = nn.ReLU(inplace=True)
        self.conv2 = nn.Conv2d(width, width, 3, stride=1, padding=1, bias=False)
        self.bn2 = nn.BatchNorm2d(width)
        self.downsample = downsample

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        identity = x if self.downsample is None else self.downsample(x)
        out = self.relu(self.bn1(self.conv1(x)))
        out = self.bn2(self.conv2(out))
        return self.relu(out + identity)


def _resnet_narrow_backbone(
    widths: Sequence[int] = (32, 64, 128, 256), depths: Sequence[int] = (1, 1, 1, 1)
) -> tuple[nn.Module, int]:
    """A ResNet-10-like stack of `BasicBlock`s at half the usual width.

    Stem: 3x3 stride-2 conv + 3x3 stride-2 max-pool (total stride 32 with the
    stages), which keeps a 128 px input at a 4x4 final map.
    """
    layers: list[nn.Module] = [_conv_bn_relu(3, widths[0], stride=2), nn.MaxPool2d(3, stride=2, padding=1)]
    c_in = widths[0]
    for stage, (width, depth) in enumerate(zip(widths, depths)):
        for block in range(depth):
            stride = 2 if (stage > 0 and block == 0) else 1
            downsample = None
            if stride != 1 or c_in != width:
                downsample = nn.Sequential(nn.Conv2d(c_in, width, 1, stride=stride, bias=False), nn.BatchNorm2d(width))
            layers.append(BasicBlock(c_in, width, stride=stride, downsample=downsample))
            c_in = width
    return nn.Sequential(*layers), c_in


def _mobilenet_backbone() -> tuple[nn.Module, int]:
    """torchvision MobileNetV3-Small feature extractor, randomly initialised (576 channels).

    torchvision builds its BatchNorm layers with momentum 0.01 (tuned for long
    ImageNet runs); over a few hundred CPU steps the running statistics would
    still be mostly their initial values and eval-mode outputs collapse to
    ~1e-7 (measured), so we use PyTorch's default 0.1.
    """
    from torchvision.models import mobilenet_v3_small  # imported only for this architecture (1.8 s)

    features = mobilenet_v3_small(weights=None).features
    for module in features.modules():
        if isinstance(module, nn.BatchNorm2d):
            module.momentum = 0.1
    return features, 576


_BACKBONES: dict[str, Callable[[], tuple[nn.Module, int]]] = {
    "tiny": _tiny_backbone,
    "resnet_narrow": _resnet_narrow_backbone,
    "mobilenet_v3_small": _mobilenet_backbone,
}
ARCHS = tuple(_BACKBONES)


def pixels(x: torch.Tensor) -> torch.Tensor:
    """Undo `normalize_tensor`: the (…, 3, H, W) batch back in [0, 1] pixel units."""
    mean = torch.tensor(IMAGENET_MEAN, dtype=x.dtype, device=x.device).view(3, 1, 1)
    std = torch.tensor(IMAGENET_STD, dtype=x.dtype, device=x.device).view(3, 1, 1)
    return x * std + mean


# Below this luma spread (about 5 grey levels) an image counts as flat and is not stretched.
MIN_LUMA_STD = 0.02


def standardise(x: torch.Tensor, how: str) -> torch.Tensor:
    """Per image: (pixels - mean) / std luma, where the mean is the luma's ("luma") or each
    channel's own ("centred"); the spread is always the luma's, so colour contrast keeps its size.

    "luma" cancels p -> a p + b with the same b in every channel (a brightness or contrast change
    without clipping, Pillow's ImageEnhance.Contrast included), while colour ratios survive (a
    per-channel spread would erase colour). "centred" also cancels a
    different b per channel: a colour cast, and a contrast change towards each channel's own mean,
    p_c -> a p_c + (1 - a) m_c, which is ImageNet-C's contrast corruption (Hendrycks and Dietterich
    2019). Under "luma" that change leaves a per-channel offset of (1 - a)(m_c - M) / (a s) in
    units of the spread: at a = 0.05 about 19 times the channel's distance from the grey mean, a
    picture tinted far beyond any training view. What "centred" gives up is the picture's mean
    colour, which a tinted copy does not keep either.

    "grey" standardises the luma alone and repeats it in the three channels: every change of
    colour that keeps each pixel's luma (a grey copy, a toned one) leaves the input as it was.
    """
    p = pixels(x)
    y = luma(p)
    std = y.std(dim=(1, 2, 3), keepdim=True).clamp(min=MIN_LUMA_STD)
    if how == "grey":
        g = (y - y.mean(dim=(1, 2, 3), keepdim=True)) / std
        return torch.cat([g, g, g], dim=1)
    mean = p.mean(dim=(2, 3), keepdim=True) if how == "centred" else y.mean(dim=(1, 2, 3), keepdim=True)
    return (p - mean) / std


class Encoder(nn.Module):
    """Input standardisation -> backbone -> pooling -> linear -> L2 normalisation.

    The output of `descriptor` is what we store: the unit-length learned vector, then,
    when `classic` names one, a unit-length classical descriptor of the same input
    (indexer/learning/classic.py); a generation's `Whitening.apply` weighs the two parts into one
    unit vector, so inner product is a weighted sum of the two cosines.
    """

    def __init__(self, backbone: nn.Module, num_features: int, dim: int = 128, pooling: str = "gem",
                 input_norm: str = "imagenet", classic: str | None = None, grey_view: bool = False):
        super().__init__()
        self.backbone = backbone
        self.num_features = num_features
        self.dim = dim
        self.pooling = pooling
        self.input_norm = input_norm
        self.classic = classic
        self.grey_view = bool(grey_view)
        self.classic_dim = classic_dim(classic)
        self.pool = GeM() if pooling == "gem" else AvgPool()
        self.fc = nn.Linear(num_features, dim)

    @property
    def out_dim(self) -> int:
        """Width of `descriptor`'s rows: the learned part, then the classical part."""
        return self.dim + self.classic_dim

    def backbone_input(self, x: torch.Tensor) -> torch.Tensor:
        """What the backbone is fed: x standardised per image as `input_norm` says."""
        return x if self.input_norm == "imagenet" else standardise(x, self.input_norm)

    def forward_features(self, x: torch.Tensor) -> torch.Tensor:
        return self.backbone(self.backbone_input(x))

    def forward_head(self, features: torch.Tensor, normalize: bool = True) -> torch.Tensor:
        """Pool and project a feature map; `normalize=False` gives the raw vector the projection head reads."""
        z = self.fc(self.pool(features))
        return F.normalize(z, dim=-1) if normalize else z

    def descriptor(self, x: torch.Tensor) -> torch.Tensor:
        if self.grey_view:
            # One backbone pass over the batch in colour and in grey; each half pooled and projected.
            n = x.shape[0]
            both = self.forward_head(self.backbone(torch.cat([self.backbone_input(x), standardise(x, "grey")], dim=0)))
            learned = F.normalize(both[:n] + both[n:], dim=-1)
        else:
            learned = self.forward_head(self.forward_features(x))
        if not self.classic:
            return learned
        return torch.cat([learned, classic_descriptor(pixels(x), self.classic)], dim=1)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.descriptor(x)


class ProjectionHead(nn.Module):
    """The MLP g(.) of SimCLR (Chen et al. 2020), used only while training.

    The contrastive loss is computed on g(h); the descriptor h before the head is
    what we keep (SimCLR's finding; benchmarks/results/train.md measures it here).
    """

    def __init__(self, in_dim: int = 128, hidden_dim: int = 512, out_dim: int = 128):
        super().__init__()
        self.net = nn.Sequential(
            nn.Linear(in_dim, hidden_dim),
            nn.BatchNorm1d(hidden_dim),
            nn.ReLU(inplace=True),
            nn.Linear(hidden_dim, out_dim),
        )

    def forward(self, h: torch.Tensor) -> torch.Tensor:
        return self.net(h)


def create_encoder(arch: str = DEFAULT_ARCH, dim: int = 128, pooling: str = "gem", *,
                   input_norm: str = DEFAULT_INPUT_NORM, classic: str | None = "default",
                   grey_view: bool = DEFAULT_GREY_VIEW) -> Encoder:
    """Build a randomly initialised encoder (never downloads weights).

    `classic="default"` takes indexer.learning.classic's default descriptor; None stores the learned vector alone."""
    if arch not in _BACKBONES:
        raise UsageError(f"unknown encoder architecture {arch!r}; choose one of {', '.join(ARCHS)}")
    if pooling not in POOLINGS:
        raise UsageError(f"unknown pooling {pooling!r}; choose one of {', '.join(POOLINGS)}")
    if input_norm not in INPUT_NORMS:
        raise UsageError(f"unknown input standardisation {input_norm!r}; choose one of {', '.join(INPUT_NORMS)}")
    if not isinstance(dim, int) or dim < 2:
        raise UsageError(f"embedding dim must be a whole number >= 2, got {dim!r}")
    classic = DEFAULT_CLASSIC if classic == "default" else classic
    check_classic(classic)
    backbone, num_features = _BACKBONES[arch]()
    return Encoder(backbone, num_features, dim=dim, pooling=pooling, input_norm=input_norm, classic=classic,
                   grey_view=grey_view)


def normalize_tensor(x: torch.Tensor) -> torch.Tensor:
    """Standardise a float (…, 3, H, W) tensor in [0, 1] with the one set of channel statistics."""
    mean = torch.tensor(IMAGENET_MEAN, dtype=x.dtype).view(3, 1, 1)
    std = torch.tensor(IMAGENET_STD, dtype=x.dtype).view(3, 1, 1)
    return (x - mean) / std


def preprocess(images: Sequence[Image.Image], size: int) -> torch.Tensor:
    """Turn PIL images into one normalised (n, 3, size, size) float batch: `inputs.square_batch` (the
    shorter side to `size`, the central square; common practice for CNN evaluation), then
    `normalize_tensor`."""
    if not images:
        return torch.empty(0, 3, size, size)
    x = torch.from_numpy(square_batch(images, size)).permute(0, 3, 1, 2).float().div_(255.0)
    return normalize_tensor(x)
