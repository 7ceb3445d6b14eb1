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
        line += f" [precision {tier['target_precision']:.2f} is not reached; this is the most precise threshold, estimated {_fmt(at['precision'])}]"
    return line


def query_line(result: dict) -> str:
    query = result["query"]
    return (f"Is this result a copy of my image? Query threshold {query['threshold']:.3f}: false-flag rate "
            f"{_fmt(query['false_flag_rate'])} on {series_count(result, 'query_negatives'):,} "
            f"{SERIES['query_negatives'][0]}, recall {_fmt(query['recall'], 2)} on "
            f"{series_count(result, 'query_positives'):,} {SERIES['query_positives'][0]}.")


def summary_text(result: dict) -> dict:
    """A headline (the near-duplicate tier) and a few plain sentences."""
    tiers = result["tiers"]
    lines = [f"{TIER_WORDS[name]}: {tier_line(tier)}" for name, tier in tiers.items()]
    if result.get("query"):
        lines.append(query_line(result))
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
    return {"headline": tier_line(tiers["near"]), "lines": lines}


def plot_png(result: dict) -> bytes:
    """Histograms of positive and negative scores with each tier's threshold drawn (PNG bytes)."""
    import matplotlib

    matplotlib.use("Agg")
    from matplotlib.figure import Figure

    dist = result["distributions"]
    fig = Figure(figsize=(8, 4.5), dpi=110)
    ax = fig.add_subplot(1, 1, 1)
    bins = np.linspace(-0.2, 1.0, 97)
    series = [("random", "random pairs", "#9a9a9a"), ("hard_negatives", "closest pairs not known to be duplicates", "#c4512b"),
              ("similar", "synthetic copies, strong edits", "#5b8fd1"), ("near", "synthetic copies, mild edits", "#1d4f91")]
    for key, label, colour in series:
        values = np.asarray(dist.get(key, []))
        if len(values):
            ax.hist(values, bins=bins, density=True, histtype="step", linewidth=1.6, color=colour,
                    label=f"{label} (n={len(values):,})")
    for name, style in (("near", "-"), ("similar", "--")):
        t = result["tiers"][name]["threshold"]
        ax.axvline(t, color="black", linestyle=style, linewidth=1)
        ax.text(t, ax.get_ylim()[1] * 0.95, f" {TIER_WORDS[name].lower()} {t:.3f}", fontsize=8, va="top")
    ax.set_xlabel("cosine similarity")
    ax.set_ylabel("density")
    ax.set_title("Where duplicates and non-duplicates score", fontsize=10)
    ax.legend(fontsize=8, loc="upper left")
    buf = io.BytesIO()
    fig.savefig(buf, format="png", bbox_inches="tight")
    return buf.getvalue()
