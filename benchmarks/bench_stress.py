"""Beyond the protocol: recall@1 on edits harder than the quality benchmark's, on a store it trained.

The quality benchmark (bench_quality.py, benchmarks/protocol.py) grades ImageNet-C corruptions at
severities 1-3 and a fixed set of other edits. Copies in real collections go further, and an
independent check may too, so this probe asks the same trained store about:

* every ImageNet-C corruption of the protocol at severities 4 and 5 (Hendrycks and Dietterich 2019;
  the constants are the protocol's, from memory of the paper's code);
* gamma 0.4 and 2.5, a half-turn of hue, posterising to 2 bits a channel;
* rotation by 20 and 90 degrees, a perspective tilt;
* crops keeping 30 % and 20 % of the area, and a half-area crop saved again as JPEG quality 20.

Queries are made from a seeded sample of the indexed photo tiles (their originals are in the
index), so recall@1 is the share whose first answer is their own original. pHash (64 bits, the
`imagehash` package, exhaustive Hamming search over the same collection) is the reference.
No threshold is involved: this is ranking only.

    .venv/bin/python benchmarks/bench_stress.py --work /tmp/nearsight-bench-quality [--store train-10min]
"""

from __future__ import annotations

import argparse
import io
import random
import sys
import time
from pathlib import Path

import numpy as np
from PIL import Image, ImageOps

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from benchmarks import bench_quality, protocol  # noqa: E402
from benchmarks.baselines import describe_files, phash_bits, phash_similarity  # noqa: E402
from benchmarks.bench_quality import _store  # noqa: E402
from benchmarks.common import machine, write_report  # noqa: E402


def _gamma(g: float):
    def edit(im, rng):
        x = np.asarray(im.convert("RGB"), np.float64) / 255.0
        return Image.fromarray(np.round(255 * x**g).astype(np.uint8))
    return edit


def _hue_half(im, rng):
    def turn(hsv):
        hsv[..., 0] = (hsv[..., 0] + 0.5) % 1.0
    return protocol._hsv_edit(im, turn)


def _perspective(im, rng):
    """A photo of a print taken at a slant: the source's top edge 12 % narrower on each side than its
    bottom edge, stretched back to the full width (Pillow's QUAD transform takes the source's corners
    in the order upper left, lower left, lower right, upper right)."""
    w, h = im.size
    d = 0.12
    quad = (w * d, 0, 0, h, w, h, w * (1 - d), 0)
    return im.convert("RGB").transform((w, h), Image.Transform.QUAD, quad, Image.Resampling.BICUBIC)


def transforms() -> dict[str, callable]:
    out = {}
    for fns in protocol.IMAGENET_C.values():
        for fn in fns:
            for severity in (4, 5):
                out[f"{fn.__name__}-{severity}"] = (lambda fn, s: lambda im, rng: fn(im.convert("RGB"), s, rng))(fn, severity)
    out.update({
        "gamma-0.4": _gamma(0.4),
        "gamma-2.5": _gamma(2.5),
        "hue-half-turn": _hue_half,
        "posterize-2": lambda im, rng: ImageOps.posterize(im.convert("RGB"), 2),
        "rotate-20": lambda im, rng: protocol.rotate_crop(im, 20),
        "rotate-90": lambda im, rng: im.rotate(90, expand=True),
        "perspective": _perspective,
        "crop-keep-30": lambda im, rng: protocol.crop_area(im, 0.3, rng),
        "crop-keep-20": lambda im, rng: protocol.crop_area(im, 0.2, rng),
        "crop-half-jpeg-20": lambda im, rng: protocol.jpeg_roundtrip(protocol.crop_area(im, 0.5, rng), 20),
    })
    return out


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--work", type=Path, default=Path("/tmp/nearsight-bench-quality"))
    parser.add_argument("--store", default="train-10min")
    parser.add_argument("--tiles", type=int, default=64, help="indexed photo tiles to edit (seeded sample)")
    parser.add_argument("--out", type=Path, default=Path("benchmarks/results/stress.md"))
    parser.add_argument("--set", action="append", default=[], metavar="NAME=VALUE",
                        help="a setting for this run (e.g. turned_views=false); repeatable")
    args = parser.parse_args()
    bench_quality.SETTINGS_OVERRIDES.update(dict(item.split("=", 1) for item in args.set))

    from nearsight.indexer.matching.query import Searcher
    from nearsight.indexer.reading.images import read_image

    collection = sorted((args.work / "collection").iterdir())
    names = [p.name for p in collection]
    tiles = random.Random(7).sample([p for p in collection if p.name.startswith("photo-")], args.tiles)
    started = time.monotonic()
    reference_bits = describe_files(collection)["phash"]
    rows = []
    with _store(args.work / "stores" / args.store, create=False) as store:
        searcher = Searcher(store)
        for name, edit in transforms().items():
            rng = np.random.default_rng(1)
            encoded = []
            for tile in tiles:
                with Image.open(tile) as im:
                    edited = edit(im.convert("RGB"), rng).convert("RGB")
                buf = io.BytesIO()
                edited.save(buf, "PNG")
                encoded.append(buf.getvalue())
            images = [read_image(io.BytesIO(data), max_side=2 * searcher.size)[0] for data in encoded]
            answers = searcher.neighbours(searcher.vectors_for_images(images), 1, images=images)
            ours = np.mean([bool(a) and Path(a[0]["path"]).name == t.name for t, a in zip(tiles, answers)])
            bits = phash_bits([Image.open(io.BytesIO(data)).convert("RGB") for data in encoded])
            best = phash_similarity(bits, reference_bits).argmax(axis=1)
            theirs = np.mean([names[b] == t.name for t, b in zip(tiles, best)])
            rows.append((name, float(ours), float(theirs)))
            print(f"{name:24s} nearsight {ours:.3f}  phash {theirs:.3f}", flush=True)
    seconds = time.monotonic() - started
    lines = [
        "# Beyond the protocol: recall@1 on harder edits",
        "",
        f"Machine: {machine()}",
        "",
        f"Command: `.venv/bin/python benchmarks/bench_stress.py --work {args.work} --store {args.store}"
        f"{''.join(' --set ' + s for s in args.set)}` "
        f"({seconds:.0f} s), on the store the quality benchmark trained (benchmarks/results/quality.md).",
        "",
        f"{args.tiles} indexed photo tiles (seeded sample), each edited once per row; recall@1 = the first answer is "
        "the tile's own original, among all {n} files of the collection. pHash: 64 bits, exhaustive Hamming search. "
        "The edits and their sources are in the script's docstring.".replace("{n}", str(len(collection))),
        "",
        "| edit | nearsight | pHash |",
        "|---|---:|---:|",
        *[f"| {name} | {ours:.3f} | {theirs:.3f} |" for name, ours, theirs in rows],
        "",
    ]
    return write_report(args.out, lines)


if __name__ == "__main__":
    raise SystemExit(main())
