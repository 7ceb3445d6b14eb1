"""What a calibration says, for a person: a short text and a plot of the score distributions."""

from __future__ import annotations

import io

import numpy as np

TIER_WORDS = {"near": "Near-duplicates", "similar": "Similar images"}


def _fmt(x, digits: int = 3) -> str:
    return "n/a" if x is None else f"{x:.{digits}f}"


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
        lines.append(f"Geometric verification put {likely['verified']:,} of the sampled images' closest other "
                     f"images down as likely duplicates (left out of the negatives) and {likely['not_verified']:,} "
                     "as look-alikes.")
    if result.get("groups"):
        lines.append(f"Groups: {groups_line(result)}")
    lines += [f"{TIER_WORDS[name]}: {tier_line(tier)}" for name, tier in tiers.items()]
    neg = result["negatives"]
    pos = result["positives"]
    excluded = sum(neg["excluded_known_duplicates"].values())
    lines.append(
        f"Measured on {2 * pos['originals']} edited copies per tier of {pos['originals']} of your images "
        f"({pos['held_out_originals']} never seen in training), the {neg['hard_pairs']:,} closest pairs of "
        f"{result['collection']['queries']:,} sampled images ({excluded:,} pairs already known to be duplicates "
        f"left out) and {neg['random_pairs']:,} random pairs."
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
