"""The cost of embedding a query's views, as ratios in one run: what calibration pays for every query.

Calibration asks the searcher ~2,000 questions (synthetic copies and the collection's own images, plain and
edited), and a query whose best candidate does not verify has its other views embedded: its mirror, itself
upside down, a quarter turn either way and its nine parts. This measures, on scikit-image's photos brought to
512 x 384 (the size calibration's copies are made at for a 128-px model), rounds interleaved:

* bringing a batch to the input side (`inputs.square_batch`) one picture after another, and shared among the
  cores (`PARALLEL_BATCH`), for large pictures, for their parts and for pictures at the input side already;
* a round of query views (32 queries: each one's four turned views, from the picture itself as before and
  from its square as `Searcher._squares` does now, and its nine parts) on ONNX Runtime sessions with and
  without the threads' spinning between runs.

Random weights: speed does not depend on them. Nothing is asserted.

    .venv/bin/python benchmarks/bench_query_views.py --out benchmarks/results/query-views.md
"""

from __future__ import annotations

import argparse
import statistics
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from benchmarks.common import machine, write_report  # noqa: E402

SIZE = 128
PHOTOS = ("astronaut", "coffee", "chelsea", "rocket", "camera", "brick", "moon", "page")


def _turns():
    from PIL import Image, ImageOps

    return [ImageOps.mirror, ImageOps.flip, lambda im: im.transpose(Image.Transpose.ROTATE_90),
            lambda im: im.transpose(Image.Transpose.ROTATE_270)]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rounds", type=int, default=5)
    parser.add_argument("--out", type=Path)
    args = parser.parse_args()

    import numpy as np
    import onnxruntime as ort
    import skimage.data
    from PIL import Image

    from nearsight.indexer.learning import inputs, runtime
    from nearsight.indexer.learning.embed import embed_images
    from nearsight.indexer.learning.encoder import DEFAULT_ARCH, create_encoder
    from nearsight.indexer.learning.model import read_card, save_model
    from nearsight.indexer.matching.regions import cut_regions

    photos = [Image.fromarray(getattr(skimage.data, n)()).convert("RGB") for n in PHOTOS]
    queries = [p.resize((512, 384), Image.BILINEAR) for p in photos] * 4  # 32 queries
    parts = [part for q in queries for part in cut_regions(q, 3)]
    with tempfile.TemporaryDirectory() as tmp:
        save_model(Path(tmp) / "m", create_encoder(DEFAULT_ARCH), {"arch": DEFAULT_ARCH, "image_size": SIZE})
        card = read_card(Path(tmp) / "m")
        data = runtime.export_onnx(create_encoder(DEFAULT_ARCH), SIZE)
    spinning = runtime.OnnxEncoder(data, card)  # built with the option, then the option taken back out
    options = ort.SessionOptions()
    options.intra_op_num_threads = spinning.session.get_session_options().intra_op_num_threads
    options.inter_op_num_threads = 1
    options.log_severity_level = 3
    spinning.session = ort.InferenceSession(data, options, providers=["CPUExecutionProvider"])
    quiet = runtime.OnnxEncoder(data, card)

    def squares(batch, parallel: bool):
        saved = inputs.PARALLEL_BATCH
        inputs.PARALLEL_BATCH = saved if parallel else 10**9
        try:
            inputs.square_batch(batch, SIZE)
        finally:
            inputs.PARALLEL_BATCH = saved

    def views(encoder, from_squares: bool):
        turns = _turns()
        base = [Image.fromarray(a) for a in inputs.square_batch(queries, SIZE)] if from_squares else queries
        embed_images(encoder, [t(q) for t in turns for q in base], SIZE)
        embed_images(encoder, parts, SIZE)

    at_side = [p.resize((170, SIZE), Image.BILINEAR) for p in photos] * 8  # 64, shorter side at the input's

    def forced(batch):  # pictures at the input side, shared among the cores as a batch to resize is
        from nearsight.indexer.core.cores import each_on_cores, usable_cores

        out = np.empty((len(batch), SIZE, SIZE, 3), np.uint8)

        def fill(rows):
            for r in rows:
                out[r] = np.asarray(inputs.resize_center_crop(batch[r], SIZE), dtype=np.uint8)

        each_on_cores(fill, [range(k, len(batch), usable_cores()) for k in range(usable_cores())])

    routes = {
        "square_batch, 32 pictures of 512 x 384, one after another": lambda: squares(queries, False),
        "square_batch, 32 pictures of 512 x 384, on the cores": lambda: squares(queries, True),
        "square_batch, 288 parts of 256 x 192, one after another": lambda: squares(parts, False),
        "square_batch, 288 parts of 256 x 192, on the cores":
            lambda: squares(parts, True),
        "square_batch, 64 pictures at the input side, one after another (as shipped: nothing to resize)":
            lambda: squares(at_side, True),
        "the same 64 shared among the cores": lambda: forced(at_side),
        "views of 32 queries, turned pictures, threads spinning (before)": lambda: views(spinning, False),
        "views of 32 queries, turned squares, threads spinning": lambda: views(spinning, True),
        "views of 32 queries, turned squares, no spinning (as shipped)": lambda: views(quiet, True),
    }
    for fn in routes.values():  # warm
        fn()
    times = {name: [] for name in routes}
    for _ in range(args.rounds):
        for name, fn in routes.items():
            started = time.perf_counter()
            fn()
            times[name].append(time.perf_counter() - started)
    medians = {name: statistics.median(t) for name, t in times.items()}
    names = list(routes)
    lines = ["## The cost of a query's views", "", machine(), "",
             f"Command: `.venv/bin/python benchmarks/bench_query_views.py{' ' + ' '.join(sys.argv[1:]) if sys.argv[1:] else ''}`",
             f"({args.rounds} interleaved rounds, medians; the default encoder at {SIZE} px, random weights, ONNX Runtime).",
             "", "| route | median (ms) | against the first of its group |", "|---|---:|---:|"]
    groups = [names[0:2], names[2:4], names[4:6], names[6:9]]
    for group in groups:
        for name in group:
            lines.append(f"| {name} | {1000 * medians[name]:.1f} | {medians[name] / medians[group[0]]:.2f} |")
    if args.out:
        write_report(args.out, lines)
    else:
        print("\n".join(lines))


if __name__ == "__main__":
    main()
