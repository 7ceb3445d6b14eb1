"""The nightly build: update the previous generation in proportion to what changed.

The previous generation stores the file ids it indexed with their content ids
(``items.npz``) and its pairs at or above the similar threshold (``pairs.npz``). Against
the catalog's present readable files they give *added* ids, *removed* ids and *replaced*
ids (same file, new bytes). Then one of three builds:

* **full** (`build.full_build`): no previous generation or one without those
  files; another model; another index spec (given, or chosen for the new size); an
  HNSW index that would have to drop vectors (it cannot); or more files added, removed
  or replaced since the last full build than ``rebuild_fraction`` of the collection at
  that build. A full build refits the whitening, so drift is bounded by that fraction.
* **incremental**: the previous whitening and index are reused; removed and replaced
  ids are taken out and added and replaced ids put in, by id; only their pairs are
  searched (k queries instead of n); groups are recomputed only in the connected
  components of the new pair graph that hold a changed file, a former partner of a
  removed one, or a member of a group whose files moved or changed; every other group
  is carried over as it was. Its cost grows with the change (plus reading and writing
  the index file once), where a full build's pair search grows with n^2.
* **unchanged**: nothing to do; a new generation shares every file with the previous
  one through hard links (cheap, and the service sees that the job ran).

The calibration is reused (same model, thresholds kept) until the changes since it
exceed ``recalibrate_change`` of the collection it measured; then it is run again, and
new thresholds regroup everything.

`make_generation` is the one entry: it chooses the build (or takes the one asked for: a full
rebuild, or a recalibration of the current generation by `nearsight calibrate`), each kind
returns a `publish.Built`, and `publish.publish_built` writes it.
"""

from __future__ import annotations

import logging
import time
from dataclasses import dataclass

import numpy as np
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components

from ..core.pause import pause_at
from ..learning.model import read_card
from ..matching import generations
from ..matching import index as faiss_index
from ..matching.groups import Group
from ..matching.index_spec import choose_spec
from ..matching.regions import regions_extra, regions_for_generation
from ..storage.store import Store
from .build import (
    Space,
    calibrate_thresholds,
    default_thresholds,
    full_build,
    groups_from_pairs,
    recalibrated,
    regroup,
    whitened_vectors,
    with_asked_pairs,
    with_verified_pairs,
)
from .publish import Built, publish_built

log = logging.getLogger(__name__)

MEMBER_FIELDS = ("path", "content_hash", "pixel_hash", "width", "height", "file_size", "format", "mtime")
DROPPED_META = ("generation", "published_at", "groups", "thresholds", "calibration", "calibrated_from")
# Margin below the threshold at which pairs are gathered from compressed codes before exact rescoring
# (the same guess as index.range_pairs; flat indexes are exact and need none).
CODE_MARGIN = 0.02


@dataclass(frozen=True)
class Change:
    """How the present indexable files differ from a generation's."""

    ids: np.ndarray        # present indexable file ids (sorted) ...
    contents: np.ndarray   # ... and their content ids
    added: np.ndarray
    removed: np.ndarray
    replaced: np.ndarray   # same id, other bytes

    @property
    def count(self) -> int:
        return int(len(self.added) + len(self.removed) + len(self.replaced))

    def to_dict(self) -> dict:
        return {"added": int(len(self.added)), "removed": int(len(self.removed)), "replaced": int(len(self.replaced))}


def diff_items(prev_ids: np.ndarray, prev_contents: np.ndarray, ids: np.ndarray, contents: np.ndarray) -> Change:
    before = dict(zip(prev_ids.tolist(), prev_contents.tolist()))
    now = dict(zip(ids.tolist(), contents.tolist()))
    added = sorted(set(now) - set(before))
    removed = sorted(set(before) - set(now))
    replaced = sorted(i for i in set(now) & set(before) if now[i] != before[i])
    as_ids = lambda values: np.array(values, dtype=np.int64)  # noqa: E731
    return Change(ids, contents, as_ids(added), as_ids(removed), as_ids(replaced))


def _family(spec: str) -> str:
    return "hnsw" if "HNSW" in spec else "ivf" if spec.startswith("IVF") else "flat"


def choose_build(prev, change: Change | None, model: str, index_spec: str | None, dim: int,
                 rebuild_fraction: float) -> tuple[str, str]:
    """("full" | "incremental", why): the rule in the module docstring."""
    if prev is None:
        return "full", "no previous generation"
    if change is None or not (prev.path / generations.PAIRS_FILE).is_file():
        return "full", f"generation {prev.name} predates incremental builds"
    if prev.meta.get("model") != model:
        return "full", f"new model {model} (generation {prev.name} used {prev.meta.get('model')})"
    spec = prev.meta.get("index_spec", "")
    wanted = index_spec or choose_spec(max(1, len(change.ids)), dim)
    if (index_spec and index_spec != spec) or _family(wanted) != _family(spec):
        return "full", f"index spec {wanted} instead of {spec}"
    if _family(spec) == "hnsw" and len(change.removed) + len(change.replaced):
        return "full", "an HNSW index cannot remove vectors"
    since = prev.meta.get("build", {}).get("since_full", {"indexed": prev.meta.get("indexed", 0), "changes": 0})
    total = since["changes"] + change.count
    if total > rebuild_fraction * max(1, since["indexed"]):
        return "full", (f"{total} files added, removed or changed since the last full build, over "
                        f"rebuild_fraction {rebuild_fraction:.0%} of {since['indexed']}")
    return "incremental", f"{change.count} files added, removed or changed"


def _calibration_plan(prev, change: Change, calibration, settings) -> tuple[str, dict | None]:
    """("default" | "reuse" | "calibrate", the next since_calibration record) for an incremental build."""
    if calibration is None:
        return "default", None
    since = prev.meta.get("build", {}).get("since_calibration")
    if "calibration" not in prev.meta or since is None:
        return "calibrate", None
    if int((prev.meta.get("regions") or {}).get("grid", 0)) != int(settings.region_grid):
        return "calibrate", None  # the query verdict was measured through another search
    from ..calibration.calibrate import MIN_IMAGES

    if "skipped" in prev.meta["calibration"] and since["indexed"] < MIN_IMAGES <= len(change.ids):
        return "calibrate", None
    total = since["changes"] + change.count
    if total > settings.recalibrate_change * max(1, since["indexed"]):
        return "calibrate", None
    return "reuse", {"indexed": since["indexed"], "changes": total}


def pairs_of(store: Store, index, q_ids: np.ndarray, xq: np.ndarray, t: float, model: str, whitening):
    """Every pair (a < b) with a query among `q_ids` and cosine >= t against the index, rescored exactly."""
    if len(q_ids) == 0:
        return np.zeros(0, np.int64), np.zeros(0, np.int64), np.zeros(0, np.float32)
    margin = 0.0 if faiss_index.index_kind(index) == "flat" else CODE_MARGIN
    a, b, _ = faiss_index.range_pairs(index, xq, q_ids, max(-1.0, t - margin), refine=False, margin=0.0)
    vec = {int(i): x for i, x in zip(q_ids, xq)}
    others = np.setdiff1d(np.r_[a, b], q_ids)
    if len(others):
        vec.update(zip(others.tolist(), whitened_vectors(store, model, whitening, others)[1]))
    sims = np.array([float(vec[int(i)] @ vec[int(j)]) for i, j in zip(a, b)], np.float32)
    keep = sims >= t
    return a[keep], b[keep], sims[keep]


def _stale_groups(store: Store, prev_groups: list[dict]) -> list[dict]:
    """Groups with a member that left, changed bytes, moved or was touched since they were made."""
    ids = [m["id"] for g in prev_groups for m in g["members"]]
    now = store.catalog.image_meta(ids)
    return [g for g in prev_groups
            if any(m["id"] not in now or any(now[m["id"]][f] != m[f] for f in MEMBER_FIELDS) for m in g["members"])]


def _components_of(seeds: np.ndarray, a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Every id connected to a seed through the pairs (a, b), seeds included; sorted."""
    nodes = np.unique(np.r_[a, b, seeds]).astype(np.int64)
    if len(seeds) == 0 or len(nodes) == 0:
        return np.zeros(0, np.int64)
    ia, ib = np.searchsorted(nodes, a), np.searchsorted(nodes, b)
    _, labels = connected_components(coo_matrix((np.ones(len(a)), (ia, ib)), shape=(len(nodes),) * 2),
                                     directed=False)
    return nodes[np.isin(labels, labels[np.searchsorted(nodes, seeds)])]


def regroup_touched(store: Store, prev, index, whitening, model: str, change: Change, thresholds: dict, *,
                    space: Space | None = None):
    """Pairs and groups after `change`, recomputing only the touched components; the new files are asked through
    the query path over `space` (build.with_asked_pairs) when it is given. Returns (pairs, groups, how much was
    regrouped)."""
    t_near, t_similar = thresholds["near"], thresholds["similar"]
    pa, pb, ps = prev.load_pairs()
    gone = np.union1d(change.removed, change.replaced)
    dropped = np.isin(pa, gone) | np.isin(pb, gone)
    fresh = np.union1d(change.added, change.replaced)
    xq = whitened_vectors(store, model, whitening, fresh)[1] if len(fresh) else np.zeros((0, index.d), np.float32)
    na, nb, ns = with_verified_pairs(store, index, fresh, xq, pairs_of(store, index, fresh, xq, t_similar, model,
                                                                      whitening), thresholds)
    if space is not None:
        na, nb, ns = with_asked_pairs(store, space, fresh, xq, (na, nb, ns), thresholds)
    a, b, sims = faiss_index.canonical_pairs(np.r_[pa[~dropped], na], np.r_[pb[~dropped], nb],
                                             np.r_[ps[~dropped], ns].astype(np.float32))
    prev_groups = prev.load_groups()["groups"]
    stale = _stale_groups(store, prev_groups)
    seeds = np.unique(np.r_[fresh, pa[dropped], pb[dropped], [m["id"] for g in stale for m in g["members"]]])
    seeds = seeds[np.isin(seeds, change.ids)].astype(np.int64)
    touched = _components_of(seeds, a, b)
    inside = np.isin(a, touched)
    xs = whitened_vectors(store, model, whitening, touched)[1] if len(touched) else np.zeros((0, index.d), np.float32)
    regrouped = groups_from_pairs(store, touched, xs, a[inside], b[inside], sims[inside], t_near=t_near,
                                  t_similar=t_similar) if len(touched) else []
    stale_gids = {g["gid"] for g in stale}
    kept = [Group.from_dict(g) for g in prev_groups
            if g["gid"] not in stale_gids and not np.isin([m["id"] for m in g["members"]], touched).any()]
    groups = sorted(kept + regrouped, key=lambda g: (-g.size, -g.best_similarity, g.gid))
    return (a, b, sims), groups, {"files_regrouped": int(len(touched)), "groups_kept": len(kept)}


def _unchanged(prev) -> Built:
    """A new generation that is the previous one: every file shared by a hard link."""
    meta = {k: v for k, v in prev.meta.items() if k not in ("generation", "published_at")}
    meta["build"] = {**prev.meta.get("build", {}), "reason": "nothing changed", "from": prev.name}
    links = {p.name: p for p in prev.path.iterdir() if p.is_file() and p.name != generations.META_FILE}
    return Built("unchanged", meta, dict(meta["thresholds"]), links=links)


def _update(store: Store, prev, model_dir, change: Change, reason: str, *, settings, calibration) -> Built:
    """The incremental build (module docstring)."""
    model = prev.meta["model"]
    started = time.monotonic()
    whitening = prev.load_whitening()
    index = prev.load_index()
    faiss_index.remove_ids(index, np.union1d(change.removed, change.replaced))
    fresh = np.union1d(change.added, change.replaced)
    if len(fresh):
        faiss_index.add(index, whitened_vectors(store, model, whitening, fresh)[1], fresh)
    regions = regions_for_generation(store, model, whitening, prev=prev,
                                     removed=np.union1d(change.removed, change.replaced), added=fresh)
    since_full = prev.meta.get("build", {}).get("since_full", {"indexed": prev.meta["indexed"], "changes": 0})
    meta = {k: v for k, v in prev.meta.items() if k not in DROPPED_META}
    meta.update(indexed=int(len(change.ids)), build={
        "reason": reason, "from": prev.name, "change": change.to_dict(),
        "since_full": {"indexed": since_full["indexed"], "changes": since_full["changes"] + change.count}})
    built = Built("incremental", meta, {}, index=index, items=(change.ids, change.contents),
                  links={generations.WHITENING_FILE: prev.path / generations.WHITENING_FILE},
                  stages={"index": round(time.monotonic() - started, 3)})
    pause_at("index")
    plan, since_calibration = _calibration_plan(prev, change, calibration, settings)
    ids = xb = None  # every vector, read once when the calibration or a full regroup needs them
    if plan == "reuse":
        built.thresholds = _kept_thresholds(prev, settings)
        meta["calibration"] = {**prev.meta["calibration"], "reused_from": prev.name}
        meta["build"]["since_calibration"] = since_calibration
        built.links.update({f: prev.path / f for f in (generations.CALIBRATION_FILE, *generations.CALIBRATION_EXTRAS)
                            if (prev.path / f).is_file()})
        log.info("calibration of generation %s reused: %s", prev.name,
                 prev.meta["calibration"].get("summary") or "no summary recorded")
    else:
        if plan == "calibrate":
            ids, xb = whitened_vectors(store, model, whitening)
        calibrate_thresholds(store, model_dir, Space(index, ids, xb, whitening, regions),
                             fallback=default_thresholds(settings),
                             calibration=calibration if plan == "calibrate" else None).into(built, len(change.ids))
    regions_extra(*regions, meta, built.files)
    started = time.monotonic()
    if all(built.thresholds[k] == prev.meta["thresholds"][k] for k in ("near", "similar")):
        built.pairs, built.groups, regrouped = regroup_touched(
            store, prev, index, whitening, model, change, built.thresholds,
            space=Space(index, np.zeros(0, np.int64), None, whitening, regions, model_dir))
    else:  # other thresholds: every pair and group anew, in the same space
        if ids is None:
            ids, xb = whitened_vectors(store, model, whitening)
        built.pairs, built.groups = regroup(store, Space(index, ids, xb, whitening, regions, model_dir),
                                            built.thresholds)
        regrouped = {"files_regrouped": int(len(ids)), "groups_kept": 0}
    meta["build"]["regrouped"] = regrouped
    built.stages["groups"] = round(time.monotonic() - started, 3)
    return built


BUILDS = ("auto", "full", "recalibrate")


def make_generation(store: Store, model_dir=None, *, build: str = "auto", index_spec: str | None = None,
                    calibration=None, reason: str | None = None) -> dict:
    """Make the store's next generation and publish it; returns the run summary's part (`publish_built`).

    `build`: "auto" chooses full, incremental or unchanged for the catalog as it is now (module docstring);
    "full" rebuilds from every vector (a repair); "recalibrate" calibrates the current generation again with
    `calibration` and regroups. `model_dir` defaults to the store's current model; `calibration` (a
    CalibrationConfig) or None for the settings' thresholds. Returns {"generation": None, "indexed": 0}
    when nothing is embedded yet."""
    from ..learning.models import require_model_dir

    if build not in BUILDS:
        raise ValueError(f"build must be one of {', '.join(BUILDS)}, not {build!r}")
    settings = store.settings
    if build == "recalibrate":
        built = recalibrated(store, calibration)
    else:
        model_dir = model_dir or require_model_dir(store)
        built = _chosen(store, model_dir, settings, index_spec, calibration, reason) if build == "auto" else \
            full_build(store, model_dir, index_spec=index_spec, calibration=calibration, reason=reason or "full build")
    if built is None:
        return {"generation": None, "indexed": 0}
    return publish_built(store, built, keep=settings.keep_generations)


def _chosen(store: Store, model_dir, settings, index_spec, calibration, reason) -> Built | None:
    """The build the module docstring's rule chooses for the catalog as it is now."""
    model = read_card(model_dir)["version"]
    prev = generations.current(store)
    ids, contents = store.catalog.indexable_items(model)
    if len(ids) == 0:
        log.warning("nothing to index: no embedded readable files")
        return None
    items = prev.load_items() if prev is not None else None
    change = diff_items(*items, ids, contents) if items is not None else None
    dim = int(prev.meta.get("dim", 0)) if prev is not None else 0
    kind, why = choose_build(prev, change, model, index_spec, dim or 1, settings.rebuild_fraction)
    log.info("%s build: %s", kind, why)
    if kind == "full":
        built = full_build(store, model_dir, index_spec=index_spec, calibration=calibration, reason=reason or why)
        if built is not None and change is not None:
            built.meta["build"]["change"] = change.to_dict()
        return built
    if change.count == 0 and _calibration_plan(prev, change, calibration, settings)[0] != "calibrate" \
            and not _stale_groups(store, prev.load_groups()["groups"]) \
            and _thresholds_kept(prev, calibration, settings) \
            and int((prev.meta.get("regions") or {}).get("grid", 0)) == int(settings.region_grid):
        return _unchanged(prev)
    return _update(store, prev, model_dir, change, reason or why, settings=settings, calibration=calibration)


def _kept_thresholds(prev, settings) -> dict:
    """The thresholds while a calibration is reused: its own, or the settings' if it was skipped."""
    t = prev.meta["thresholds"]
    return dict(t) if t.get("source") == "calibrated" else default_thresholds(settings)


def _thresholds_kept(prev, calibration, settings) -> bool:
    """Whether a build now would keep the previous thresholds (a calibration reused, or the same defaults)."""
    t = prev.meta["thresholds"]
    if calibration is not None and t.get("source") == "calibrated":
        return True
    return t.get("source") == "default" and (t["near"], t["similar"]) == (settings.near_threshold,
                                                                            settings.similar_threshold)


def group_changes(before: list[dict], after: list[dict]) -> dict:
    """How the groups changed, by their member ids: new (no member was in a group), grown (all of one
    earlier group plus more), shrunk (part of one earlier group), reshaped (any other overlap),
    dissolved (no member in a group any more), unchanged."""
    old = [frozenset(m["id"] for m in g["members"]) for g in before]
    owner = {i: n for n, members in enumerate(old) for i in members}
    counts = dict.fromkeys(("new", "grown", "shrunk", "reshaped", "unchanged", "dissolved"), 0)
    in_groups = set()
    for g in after:
        members = frozenset(m["id"] for m in g["members"])
        in_groups |= members
        sources = {owner[i] for i in members if i in owner}
        if not sources:
            counts["new"] += 1
        elif len(sources) == 1 and members == old[next(iter(sources))]:
            counts["unchanged"] += 1
        elif len(sources) == 1 and members > old[next(iter(sources))]:
            counts["grown"] += 1
        elif len(sources) == 1 and members < old[next(iter(sources))]:
            counts["shrunk"] += 1
        else:
            counts["reshaped"] += 1
    counts["dissolved"] = sum(1 for members in old if not members & in_groups)
    return counts
