"""indexer.calibration.calibration_report's plot: threshold labels never overlap each other or the legend,
and the legend's counts are calibration.txt's. Extents come from matplotlib's own Agg renderer
(`Text.get_window_extent`, `Legend.get_window_extent`, `Bbox.overlaps`) after a real draw."""

import io
import re

import numpy as np
import pytest
from PIL import Image

from nearsight.indexer.calibration.calibration_report import LABEL_GID, plot_figure, plot_png, summary_text


def _tier(rng, threshold, target, positives, duplicate_pairs):
    recall = float(rng.uniform(0.6, 0.9))
    precision = float(rng.uniform(target, 0.999))
    called = duplicate_pairs * recall / precision
    return {
        "name": "tier", "target_precision": target, "target_met": True, "threshold": threshold,
        "positives": positives, "duplicate_pairs": duplicate_pairs,
        "at_threshold": {
            "precision": precision, "precision_interval": [precision - 0.02, min(precision + 0.005, 1.0)],
            "recall": recall, "recall_interval": [recall - 0.04, recall + 0.03],
            "expected_wrong_pairs": called * (1 - precision), "called_pairs": called,
        },
    }


def synthetic_result(near=0.953, similar=0.951, groups=0.955, query=0.612, seed=0):
    """A calibration.json-shaped dict: scores from a seeded generator, counts of a real-sized run
    (256 originals, 2,000 queries, 50,000 random pairs of which 5,000 are stored, as calibrate keeps).
    `groups` or `query` None leaves that key out, as in calibrations written before they existed."""
    rng = np.random.default_rng(seed)
    originals, queries, random_pairs, hard_pairs = 256, 2_000, 50_000, 3_214
    near_n, similar_n = 2 * originals - 3, 2 * originals - 1  # a few originals could not be read
    n_images = 40_000
    result = {
        "collection": {"images": n_images, "pairs": n_images * (n_images - 1) // 2, "queries": queries},
        "positives": {"originals": originals, "held_out_originals": 97},
        "negatives": {"floor": 0.41, "hard_pairs": hard_pairs, "random_pairs": random_pairs,
                      "excluded_known_duplicates": {"same-bytes": 12, "same-pixels": 3}},
        "assumptions": ["real duplicates score like the synthetic copies", "the tail falls off exponentially"],
        "tiers": {"near": _tier(rng, near, 0.99, near_n, 1_830.4), "similar": _tier(rng, similar, 0.90, similar_n, 2_911.7)},
        "verdicts": None,
        "distributions": {
            "near": (1 - rng.gamma(2.0, 0.02, near_n)).round(4).tolist(),
            "similar": (1 - rng.gamma(2.0, 0.06, similar_n)).round(4).tolist(),
            "hard_negatives": (0.41 + rng.exponential(0.05, hard_pairs)).clip(max=1).round(4).tolist(),
            "random": rng.normal(0.08, 0.11, 5_000).round(4).tolist(),
        },
    }
    if groups is not None:
        result["groups"] = {"threshold": groups, "source": "pairs", "almost_no_duplicates": False,
                            "expected_duplicate_pairs": 1_830.4, "reason": "pairwise precision 0.99 reached"}
    if query is not None:
        positives, negatives = 509, 1_987
        result["query"] = {"threshold": query, "false_flag_rate": 0.0105, "recall": 0.874,
                           "false_flag_interval": [0.0068, 0.0162], "recall_interval": [0.842, 0.9],
                           "target_false_flag_rate": 0.01, "target_confirmed": True,
                           "likely_duplicates": {"verified": 41, "not_verified": negatives},
                           "positives": positives, "negatives": negatives}
        result["distributions"] |= {
            "query_positives": (0.9 - rng.gamma(2.0, 0.1, positives)).round(4).tolist(),
            "query_negatives": rng.normal(0.25, 0.12, negatives).round(4).tolist(),
        }
    return result


def drawn(result):
    fig = plot_figure(result)
    fig.canvas.draw()  # a real Agg draw, so every extent below is what the PNG shows
    renderer = fig.canvas.get_renderer()
    labels = [t for ax in fig.axes for t in ax.texts if t.get_gid() == LABEL_GID]
    return fig, renderer, labels


THRESHOLDS = {  # near, similar, grouping, query
    "close": (0.953, 0.951, 0.955, 0.612),
    "far": (0.62, 0.45, 0.80, 0.30),
    "low, where a legend inside the axes would sit": (0.12, 0.10, 0.14, -0.1),
    "grouping at the near threshold": (0.953, 0.951, 0.953, 0.99),
}


@pytest.mark.parametrize("case", THRESHOLDS)
def test_threshold_labels_overlap_nothing(case):
    near, similar, groups, query = THRESHOLDS[case]
    result = synthetic_result(near, similar, groups, query)
    fig, renderer, labels = drawn(result)
    distinct = len({round(t, 9) for t in (near, similar, groups)})
    assert len(fig.axes) == 2 and len(labels) == 1 + distinct  # equal thresholds share one line and label
    boxes = [t.get_window_extent(renderer) for t in labels]
    for i in range(len(boxes)):
        for j in range(i + 1, len(boxes)):
            # Not even touching: two pixels of air, so that two labels never read as one.
            assert not boxes[i].padded(2).overlaps(boxes[j]), (labels[i].get_text(), labels[j].get_text())
    legends = [ax.get_legend().get_window_extent(renderer) for ax in fig.axes]
    for label, box in zip(labels, boxes):
        assert not any(box.overlaps(legend) for legend in legends), label.get_text()
        # Readable where it belongs: inside its panel, and touching its own line (within a few pixels).
        ax = label.axes
        frame = ax.get_window_extent(renderer)
        assert frame.x0 <= box.x0 and box.x1 <= frame.x1 and frame.y0 <= box.y0 and box.y1 <= frame.y1
        x_line = ax.transData.transform((label.get_position()[0], 0))[0]
        assert min(abs(box.x0 - x_line), abs(box.x1 - x_line)) <= 8
    texts = " | ".join(t.get_text() for t in labels)
    assert f"grouping {groups:.3f}" in texts and f"threshold {query:.3f}" in texts
    if groups == near:
        assert f"near-duplicates and grouping {near:.3f}" in texts


def test_legend_counts_are_the_calibration_counts():
    """Each legend entry "<noun> (n=N)" matches "N <noun>" in calibration.txt's lines, and N is
    the calibration's count, not the size of the stored sample."""
    result = synthetic_result()
    fig, _, _ = drawn(result)
    text = "\n".join(summary_text(result)["lines"])
    entries = [t.get_text() for ax in fig.axes for t in ax.get_legend().get_texts()]
    assert len(entries) == 6
    for entry in entries:
        noun, n = re.match(r"^(.+?) \(n=([\d,]+)\)", entry).groups()
        in_text = re.findall(rf"(\d[\d,]*) {re.escape(noun)}\b", text)
        assert in_text and {int(x.replace(",", "")) for x in in_text} == {int(n.replace(",", ""))}, entry
    random_entry = next(e for e in entries if e.startswith("random pairs"))
    assert f"n={result['negatives']['random_pairs']:,}" in random_entry
    assert f"n={len(result['distributions']['random']):,}" not in random_entry


def test_old_calibration_without_query_or_groups_plots_one_panel():
    result = synthetic_result(groups=None, query=None)
    fig, renderer, labels = drawn(result)
    assert len(fig.axes) == 1 and len(labels) == 2
    assert not labels[0].get_window_extent(renderer).overlaps(labels[1].get_window_extent(renderer))
    assert len(fig.axes[0].get_legend().get_texts()) == 4
    with Image.open(io.BytesIO(plot_png(result))) as im:
        assert im.format == "PNG" and im.size[0] > 300
