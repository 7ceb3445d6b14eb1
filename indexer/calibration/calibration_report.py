"""What a calibration says, for a person: a short text and a plot of the score distributions."""

from __future__ import annotations

import io

import numpy as np

TIER_WORDS = {"near": "Near-duplicates", "similar": "Similar images"}

# Each plotted series: the noun its count goes with (the same words in calibration.txt and the
# legend, so a reader can match them), what the series shows, and its colour.
SERIES = {
    "query_positives": ("edited copies", "score of their original", "#1d4f91"),
    "query_negatives": ("queries without their original", "best wrong result", "#c4512b"),
    "random": ("random pairs", "", "#9a9a9a"),
    "hard_negatives": ("closest pairs", "known duplicates left out", "#c4512b"),
    "similar": ("copies with strong edits", "", "#5b8fd1"),
    "near": ("copies with mild edits", "", "#1d4f91"),
}


def _fmt(x, digits: int = 3) -> str:
    return "n/a" if x is None else f"{x:.{digits}f}"


def series_count(result: dict, key: str) -> int:
    """The calibration's own count for a series; its stored distribution may be a sample of it."""
    if key.startswith("query_"):
        return result["query"]["positives" if key == "query_positives" else "negatives"]
    if key in result["tiers"]:
        return result["tiers"][key]["positives"]
    return result["negatives"]["random_pairs" if key == "random" else "hard_pairs"]


def tier_line(tier: dict) -> str:
    at = tier["at_threshold"]
    lo, hi = at["precision_interval"]
    r_lo, r_hi = at["recall_interval"]
    line = (f"threshold {tier['threshold']:.3f} for precision {tier['target_precision']:.2f} "
            f"({_fmt(lo)}-{_fmt(hi)}): about {at['expected_wrong_pairs']:,.0f} wrong pairs expected among "
            f"{at['called_pairs']:,.0f} called duplicates; recall {_fmt(at['recall'], 2)} ({_fmt(r_lo, 2)}-{_fmt(r_hi, 2)})")
    if not tier["target_met"]:
        line += f" [precision {tier['target_precision']:.2f} is reached at no threshold; estimated {_fmt(at['precision'])} here]"
    return line


def query_line(query: dict) -> str:
    """The query verdict in a sentence: its threshold, false-flag rate and recall with intervals."""
    f_lo, f_hi = query["false_flag_interval"]
    r_lo, r_hi = query["recall_interval"]
    line = (f"a result is called a copy of your image from score {query['threshold']:.3f}: "
            f"{query['false_flag_rate']:.1%} of {query['negatives']:,} queries without their original got a flag "
            f"({f_lo:.1%}-{f_hi:.1%}; target {query['target_false_flag_rate']:.0%}), and it finds "
            f"{_fmt(query['recall'], 2)} ({_fmt(r_lo, 2)}-{_fmt(r_hi, 2)}) of {query['positives']:,} edited copies")
    flags_at = query.get("false_flag_threshold")
    if flags_at is not None and query["threshold"] > flags_at:
        line += (f" (raised from {flags_at:.3f}, where the false-flag target alone would put it, to where a copy "
                 "is at least as likely as not)")
    if not query["target_confirmed"]:
        line += (f" [{query['negatives']:,} queries are too few to confirm a rate of "
                 f"{query['target_false_flag_rate']:.0%}: the threshold sits above every one of them]")
    return line


def groups_line(result: dict) -> str:
    """What groups are built at, in plain words (above all when the collection holds almost no duplicates)."""
    groups, near = result["groups"], result["tiers"]["near"]
    pairs = result["collection"]["pairs"]
    if groups["almost_no_duplicates"]:
        head = (f"This collection holds almost no duplicates: about {groups['expected_duplicate_pairs']:,.0f} "
                f"pairs expected among its {pairs:,} pairs. ")
    else:
        head = f"About {groups['expected_duplicate_pairs']:,.0f} duplicate pairs are expected among its {pairs:,} pairs. "
    if groups["source"] == "query":
        return head + (f"Groups use threshold {groups['threshold']:.3f}, the query verdict's on the descriptor's scale "
                       f"(the pairwise estimate reaches precision {near['target_precision']:.2f} nowhere).")
    return head + f"Groups use threshold {groups['threshold']:.3f}: {tier_line(near)}."


def questions(result: dict | None) -> dict | None:
    """The two calibrated questions, each with its threshold, meaning and figures (for status)."""
    if not result or not result.get("query"):
        return None
    query, groups = result["query"], result.get("groups") or {}
    near_at = result["tiers"]["near"]["at_threshold"]
    return {
        "query": {"question": "is this result a copy of my image?", "threshold": query["threshold"],
                  "scale": "similarity", "target_false_flag_rate": query["target_false_flag_rate"],
                  "false_flag_rate": query["false_flag_rate"], "false_flag_interval": query["false_flag_interval"],
                  "recall": query["recall"], "recall_interval": query["recall_interval"], "text": query_line(query)},
        "groups": {"question": "which pairs in this collection are copies?", "threshold": groups.get("threshold"),
                   "scale": "descriptor_similarity", "source": groups.get("source"),
                   "almost_no_duplicates": groups.get("almost_no_duplicates"),
                   "expected_duplicate_pairs": groups.get("expected_duplicate_pairs"),
                   "precision": near_at["precision"], "precision_interval": near_at["precision_interval"],
                   "text": groups_line(result)},
    }


def summary_text(result: dict) -> dict:
    """A headline (the query verdict, or the near-duplicate tier for a calibration without one) and a
    few plain sentences."""
    tiers = result["tiers"]
    query = result.get("query")
    lines = []
    if query:
        lines.append(f"Queries: {query_line(query)}.")
        likely = query["likely_duplicates"]
        unlike = likely.get("verified_unlike_copies", 0)
        lines.append(f"Geometric verification put {likely['verified']:,} of the sampled images' closest other "
                     f"images down as likely duplicates (left out of the negatives) and {likely['not_verified']:,} "
                     "as look-alikes" + (f"; {unlike:,} more verified but scored unlike the synthetic copies, and "
                                         "count as look-alikes" if unlike else "") + ".")
    if result.get("groups"):
        lines.append(f"Groups: {groups_line(result)}")
    lines += [f"{TIER_WORDS[name]}: {tier_line(tier)}" for name, tier in tiers.items()]
    neg = result["negatives"]
    pos = result["positives"]
    excluded = sum(neg["excluded_known_duplicates"].values())
    copies = " and ".join(f"{series_count(result, tier):,} {SERIES[tier][0]}" for tier in tiers)
    lines.append(
        f"Measured on copies of {pos['originals']} of your images ({pos['held_out_originals']} never seen in "
        f"training), {copies}; the {neg['hard_pairs']:,} {SERIES['hard_negatives'][0]} of "
        f"{result['collection']['queries']:,} sampled images ({excluded:,} pairs already known to be duplicates "
        f"left out) and {neg['random_pairs']:,} {SERIES['random'][0]}."
    )
    lines.append(
        f"About {tiers['near']['duplicate_pairs']:,.0f} near-duplicate pairs are estimated among the "
        f"{result['collection']['pairs']:,} pairs of {result['collection']['images']:,} images; this assumes "
        + "; ".join(result["assumptions"]) + "."
    )
    verdicts = result.get("verdicts")
    if verdicts and verdicts.get("used"):
        at = verdicts["at_threshold"]
        lo, hi = at["interval"]
        lines.append(f"Your {verdicts['verdicts']} verdicts: precision {_fmt(at['precision'])} ({_fmt(lo)}-{_fmt(hi)}) "
                     f"on the {at['judged_pairs']} judged pairs at or above the near-duplicate threshold.")
    elif verdicts:
        lines.append(f"Your verdicts ({verdicts['verdicts']}) are not used yet: calibration {verdicts['reason']}.")
    headline = query_line(query) if query else tier_line(tiers["near"])
    return {"headline": headline, "lines": lines}


# -- the plot ---------------------------------------------------------------------------------
MARK_WORDS = {"near": "near-duplicates", "similar": "similar images", "groups": "grouping"}
LINE_STYLES = {"near": "-", "similar": "--", "groups": ":"}
LABEL_GID = "threshold-label"  # lets a reader (and the tests) find the threshold labels among the texts
LABEL_GAP = 3.0  # points between a label and its line, and between two labels


def query_marks(result: dict) -> list[tuple[float, str, str]]:
    """(threshold, label, line style) of the query panel."""
    query = result["query"]
    t = query["threshold"]
    return [(t, f"threshold {t:.3f}\nfalse flags {_fmt(query['false_flag_rate'])}\nrecall {_fmt(query['recall'], 2)}", "-")]


def collection_marks(result: dict) -> list[tuple[float, str, str]]:
    """(threshold, label, line style) per distinct threshold of the collection panel: the tiers'
    and, in calibrations that have one, the grouping threshold; equal thresholds share a line."""
    named = [(result["tiers"][tier]["threshold"], tier) for tier in ("near", "similar")]
    groups = result.get("groups")
    if groups and groups.get("threshold") is not None:
        named.append((groups["threshold"], "groups"))
    shared: dict[float, list[str]] = {}
    for value, name in named:
        same = next((v for v in shared if abs(v - value) < 1e-9), value)
        shared.setdefault(same, []).append(name)
    return [(value, f"{' and '.join(MARK_WORDS[n] for n in names)} {value:.3f}", LINE_STYLES[names[0]])
            for value, names in shared.items()]


def series_label(result: dict, key: str) -> str:
    noun, detail, _ = SERIES[key]
    return f"{noun} (n={series_count(result, key):,})" + (f", {detail}" if detail else "")


def _draw_series(ax, result: dict, keys: tuple[str, ...], marks: list) -> float:
    """Step histograms (densities of the stored samples, counts of the calibration); returns the peak density."""
    dist = result["distributions"]
    samples = {key: np.asarray(dist.get(key) or [], dtype=float) for key in keys}
    samples = {key: values for key, values in samples.items() if len(values)}
    span = np.concatenate([*samples.values(), [value for value, _, _ in marks]])
    bins = np.linspace(span.min() - 0.02, span.max() + 0.02, 97)
    peak = 0.0
    for key, values in samples.items():
        density, _, _ = ax.hist(values, bins=bins, density=True, histtype="step", linewidth=1.6,
                                color=SERIES[key][2], label=series_label(result, key))
        peak = max(peak, float(density.max()))
    return peak


def _place_labels(ax, marks: list, renderer) -> float:
    """Draw each threshold's line and its label; returns the lowest label's bottom (axes fraction).

    A label sits beside its line, right of it or left when it would leave the axes, at the top;
    a label that would overlap one already placed moves down below it, so close thresholds
    (0.951, 0.953, 0.955) give a staircase of labels instead of one smudge.
    """
    from matplotlib.patheffects import withStroke
    from matplotlib.transforms import ScaledTranslation, blended_transform_factory

    fig = ax.figure
    gap = LABEL_GAP * fig.dpi / 72
    frame = ax.get_window_extent(renderer)
    x_data_y_axes = blended_transform_factory(ax.transData, ax.transAxes)
    placed = []
    for value, text, style in sorted(marks):
        ax.axvline(value, color="black", linestyle=style, linewidth=1)
        label = ax.text(value, 0.98, text, va="top", fontsize=8, gid=LABEL_GID,
                        path_effects=[withStroke(linewidth=3, foreground="white")])
        for ha, side in (("left", 1), ("right", -1)):
            label.set_horizontalalignment(ha)
            label.set_transform(x_data_y_axes + ScaledTranslation(side * LABEL_GAP / 72, 0, fig.dpi_scale_trans))
            box = label.get_window_extent(renderer)
            if frame.x0 <= box.x0 and box.x1 <= frame.x1:
                break
        # Each move puts the label wholly below a placed one, never back up: at most len(placed) moves.
        # Side by side, labels keep a character's width apart so that two never read as one; the
        # vertical pad stays under the gap of a move (Bbox.overlaps counts touching edges).
        for _ in range(len(placed)):
            hits = [other for other in placed if other.overlaps(box.padded(2 * gap, gap / 2))]
            if not hits:
                break
            anchor = ax.transAxes.transform((0, label.get_position()[1]))[1]
            anchor -= box.y1 - (min(other.y0 for other in hits) - gap)
            label.set_y(ax.transAxes.inverted().transform((0, anchor))[1])
            box = label.get_window_extent(renderer)
        placed.append(box)
    return float(ax.transAxes.inverted().transform((0, min(box.y0 for box in placed)))[1])


def plot_figure(result: dict):
    """The calibration as a matplotlib Figure (Agg canvas): a panel for the query question when the
    calibration measured it, and one for the collection's pairs, each with its thresholds."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    panels = []
    if result.get("query"):
        panels.append(("Is this result a copy of my image?", "query score",
                       ("query_negatives", "query_positives"), query_marks(result)))
    panels.append(("Which pairs in this collection are copies?", "cosine similarity",
                   ("random", "hard_negatives", "similar", "near"), collection_marks(result)))
    fig = Figure(figsize=(5.5 * len(panels), 4.5), dpi=110, layout="constrained")
    FigureCanvasAgg(fig)
    drawn = []
    for i, (title, xlabel, keys, marks) in enumerate(panels):
        ax = fig.add_subplot(1, len(panels), i + 1)
        peak = _draw_series(ax, result, keys, marks)
        ax.set_title(title, fontsize=10)
        ax.set_xlabel(xlabel)
        ax.set_ylabel("density")
        # Below the axes, where no threshold label can reach it.
        ax.legend(fontsize=8, loc="upper center", bbox_to_anchor=(0.5, -0.16), frameon=False)
        drawn.append((ax, peak, marks))
    # Labels are measured in pixels, so the layout is settled first and then frozen.
    fig.draw_without_rendering()
    fig.set_layout_engine("none")
    renderer = fig.canvas.get_renderer()
    for ax, peak, marks in drawn:
        lowest = _place_labels(ax, marks, renderer)
        ax.set_ylim(0, max(peak, 1e-9) * 1.02 / max(lowest - 0.03, 0.4))  # the histograms stay under the labels
    return fig


def plot_png(result: dict) -> bytes:
    """The calibration plot (plot_figure) as PNG bytes."""
    buf = io.BytesIO()
    plot_figure(result).savefig(buf, format="png", bbox_inches="tight")
    return buf.getvalue()
