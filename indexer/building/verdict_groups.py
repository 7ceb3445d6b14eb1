"""Groups as a person's verdicts leave them: "different" splits a pair at once, "same" joins one.

The published generation's groups.json is never rewritten for a verdict. Whoever reads groups
(`nearsight groups`, the service, the quarantine plan) calls `current_groups`, which applies the
latest verdict on each pair of contents to the groups it read, whatever the number of verdicts:

- "different" between two members of one group: the group is split again by the grouping's own
  rule (`groups.build_groups` on the members' exact cosines, each pair raised to what the build
  confirmed: `confirmed_floor`, so a copy that joined on verification stays) with that pair kept
  apart, so no group holds both and nothing chains them back together;
- "same" between files not in one group: the files a person called the same picture (joined in
  verdict order, never across a "different") gather in the group already holding most of them
  (ties: the larger group), or in a new group when none is grouped. A file that comes in is a
  member with tier "person-same"; the group it left is formed again from the members left. A
  file called different from a member of that group stays where it was.

A "person-same" member is held in its group by a verdict, not by its similarity: the quarantine
plan moves it only when the verdict is with the keeper itself.
"""

from __future__ import annotations

import logging
from collections import Counter
from dataclasses import dataclass, field, replace
from typing import Callable, Iterable, Mapping, Sequence

import numpy as np

from ..core.errors import UsageError
from ..matching.groups import TIERS, Group, ImageMeta, Member, build_groups, group_id, keeper_key

log = logging.getLogger(__name__)

PERSON = "person-same"

# ids -> unit vectors (in the groups' space) of those ids that have one
Vectors = Callable[[Sequence[int]], Mapping[int, np.ndarray]]
# ids -> ImageMeta of those ids that are present and readable
Metas = Callable[[Sequence[int]], Mapping[int, ImageMeta]]


@dataclass(frozen=True)
class PairVerdicts:
    """The latest verdict on each pair of contents, as pairs of file ids (every file of each content)."""

    same: tuple[tuple[int, int], ...] = ()  # oldest verdict first
    different: frozenset = frozenset()  # frozenset({a, b}) per pair
    _same_set: frozenset = field(default=frozenset(), repr=False, compare=False)
    _apart_of: Mapping[int, frozenset] = field(default_factory=dict, repr=False, compare=False)

    def __post_init__(self) -> None:
        object.__setattr__(self, "_same_set", frozenset(frozenset(p) for p in self.same))
        apart: dict[int, set[int]] = {}
        for pair in self.different:
            a, b = tuple(pair)
            apart.setdefault(a, set()).add(b)
            apart.setdefault(b, set()).add(a)
        object.__setattr__(self, "_apart_of", {k: frozenset(v) for k, v in apart.items()})

    @classmethod
    def from_rows(cls, rows: Iterable[Mapping]) -> "PairVerdicts":
        """From rows with `verdict`, `file_a` and `file_b`, oldest first (`Catalog.latest_verdict_files`)."""
        same, different = [], set()
        for row in rows:
            pair = (int(row["file_a"]), int(row["file_b"]))
            if row["verdict"] == "same":
                same.append(pair)
            else:
                different.add(frozenset(pair))
        return cls(tuple(same), frozenset(different))

    def __bool__(self) -> bool:
        return bool(self.same or self.different)

    def said_same(self, a: int, b: int) -> bool:
        return frozenset((a, b)) in self._same_set

    def apart_from(self, a: int) -> frozenset:
        """The files a person called different from `a`."""
        return self._apart_of.get(a, frozenset())


def apply_verdicts(groups: list[Group], verdicts: PairVerdicts, *, vectors: Vectors, metas: Metas,
                   t_near: float, t_similar: float) -> list[Group]:
    """`groups` (built at `t_near`, `t_similar`) with `verdicts` applied, as the module docstring says.

    Groups no verdict touches come back as they were. `vectors(ids)` gives exact cosines for the
    regrouping (a member without a vector, e.g. quarantined since, drops out of a group formed
    again); `metas(ids)` describes files joined from outside every group. Sorted like build_groups."""
    if not verdicts:
        return groups
    if not 0 < t_similar <= t_near <= 1:
        raise UsageError(f"verdicts need thresholds 0 < t_similar <= t_near <= 1, got {t_similar}, {t_near}")
    regroup = _Regroup(verdicts, vectors, t_near, t_similar)
    out = _join(_split(groups, regroup), verdicts, regroup, metas)
    out.sort(key=lambda g: (-g.size, -g.best_similarity, g.gid))
    return out


@dataclass
class _Regroup:
    """The grouping's own split of some files, with every pair a person called different kept apart."""

    verdicts: PairVerdicts
    vectors: Vectors
    t_near: float
    t_similar: float

    def __call__(self, members: list[Member], tier: str = "similar") -> list[Group]:
        """The split of `members` of one published group of tier `tier` (confirmed_floor)."""
        found = self.vectors([m.id for m in members])
        kept = [m for m in members if m.id in found]
        if len(kept) < 2:
            return []
        ids = np.array([m.id for m in kept], np.int64)
        X = np.stack([np.asarray(found[int(i)], np.float32) for i in ids])
        S = confirmed_floor(X.astype(np.float64) @ X.T.astype(np.float64), kept, tier, self.t_near, self.t_similar)
        i, j = np.triu_indices(len(ids), 1)
        inside = set(ids.tolist())
        apart = [(a, b) for a in ids.tolist() for b in self.verdicts.apart_from(a) if a < b and b in inside]
        row = {int(x): n for n, x in enumerate(ids)}
        return build_groups(ids[i], ids[j], S[i, j], _separable({m.id: m.meta for m in kept}, apart),
                            t_near=self.t_near, t_similar=self.t_similar,
                            vectors=lambda sub: X[[row[int(x)] for x in sub]], apart=apart)


def confirmed_floor(S: np.ndarray, members: list[Member], tier: str, t_near: float, t_similar: float) -> np.ndarray:
    """`S` (cosines between `members` of one published group of tier `tier`, keeper first when it is among
    them) raised to what grouping confirmed when the group was built: every pair of a group passed (a
    verified pair scores far above its cosine: a tight crop, a fogged copy), at `t_near` in a group of tier
    near-duplicate or stronger (every pair >= t_near, groups.build_groups) and at `t_similar` otherwise, and
    each member its recorded similarity to the keeper. A file a person joined ("person-same") was confirmed
    with nobody, so its pairs keep their cosines. Without this, a "different" between two members re-split
    the group on cosines alone and dropped its verified copies."""
    S = S.copy()
    built = [n for n, m in enumerate(members) if m.tier != PERSON]
    if len(built) >= 2:
        level = t_near if TIERS.index(tier) <= TIERS.index("near-duplicate") else t_similar
        block = np.ix_(built, built)
        S[block] = np.maximum(S[block], level)
    if built and built[0] == 0 and members[0].similarity >= 1.0:  # the keeper, listed first
        for n in built[1:]:
            S[0, n] = S[n, 0] = max(S[0, n], float(members[n].similarity))
    np.fill_diagonal(S, 1.0)
    return S


def _separable(meta: dict[int, ImageMeta], apart: list[tuple[int, int]]) -> dict[int, ImageMeta]:
    """A person called two same-pixel files different: their pixel hash no longer makes them one image."""
    hashes = {meta[a].pixel_hash for a, b in apart if meta[a].pixel_hash and meta[a].pixel_hash == meta[b].pixel_hash}
    if not hashes:
        return meta
    return {k: replace(m, pixel_hash=None) if m.pixel_hash in hashes else m for k, m in meta.items()}


def _split(groups: list[Group], regroup: _Regroup) -> list[Group]:
    where = {m.id: n for n, g in enumerate(groups) for m in g.members}
    touched = {where[a] for pair in regroup.verdicts.different for a, b in [tuple(pair)]
               if a in where and where[a] == where.get(b)}
    out = [g for n, g in enumerate(groups) if n not in touched]
    for n in sorted(touched):
        out += regroup(groups[n].members, groups[n].tier)
    return out


def person_classes(verdicts: PairVerdicts) -> list[list[int]]:
    """Files a person called the same picture, joined in verdict order (a "same" that would put two
    files called different into one class is left out); classes of two or more, each sorted."""
    members: dict[int, set[int]] = {}
    root: dict[int, int] = {}
    for a, b in verdicts.same:
        ra, rb = root.setdefault(a, a), root.setdefault(b, b)
        ma, mb = members.setdefault(ra, {a}), members.setdefault(rb, {b})
        if ra == rb:
            continue
        if any(verdicts.apart_from(x) & mb for x in ma):
            log.info("a 'same' on %d and %d is left out: it would join files called different", a, b)
            continue
        for x in mb:
            root[x] = ra
        ma |= members.pop(rb)
    return [sorted(m) for m in members.values() if len(m) > 1]


def _join(groups: list[Group], verdicts: PairVerdicts, regroup: _Regroup, metas: Metas) -> list[Group]:
    classes = person_classes(verdicts)
    if not classes:
        return groups
    by_gid = {g.gid: g for g in groups}
    where = {m.id: g.gid for g in groups for m in g.members}
    holding = {}  # target gid -> the files it will hold: a file called different from one stays put
    plans = []
    for files in classes:
        counts = Counter(where[f] for f in files if f in where)
        target = max(counts, key=lambda gid: (counts[gid], by_gid[gid].size, gid)) if counts else None
        anchors = [f for f in files if where.get(f) == target] if target else files[:1]
        held = holding.setdefault(target, {m.id for m in by_gid[target].members}) if target else set(anchors)
        movers = []
        for f in files:
            if f in held:
                continue
            if verdicts.apart_from(f) & held:
                log.info("file %d stays where it is: a person called it different from a file it would join", f)
                continue
            movers.append(f)
            held.add(f)
        if movers:
            plans.append((anchors, movers))
    leaving = {f for _, movers in plans for f in movers if f in where}
    sources = {where[f] for f in leaving}
    out = [g for g in groups if g.gid not in sources]
    for gid in sorted(sources):
        out += regroup([m for m in by_gid[gid].members if m.id not in leaving], by_gid[gid].tier)
    member_meta = {m.id: m.meta for g in groups for m in g.members}
    for anchors, movers in plans:
        out = _attach(out, anchors, movers, member_meta, regroup.vectors, metas)
    return out


def _attach(groups: list[Group], anchors: list[int], movers: list[int], member_meta: dict[int, ImageMeta],
            vectors: Vectors, metas: Metas) -> list[Group]:
    """The movers joined to the group that holds the anchors now, or a new group of them all."""
    found = next((n for n, g in enumerate(groups) for m in g.members if m.id in anchors), None)
    if found is None:
        files = anchors + movers
        meta = {**metas([f for f in files if f not in member_meta]),
                **{f: member_meta[f] for f in files if f in member_meta}}
        files = [f for f in files if f in meta]
        if len(files) < 2:
            return groups
        keeper = min(files, key=lambda f: (*keeper_key(meta[f]), f))
        base = Group("", PERSON, keeper, [Member(keeper, "same-bytes", 1.0, meta[keeper])])
        movers = [f for f in files if f != keeper]
    else:
        base = groups[found]
        meta = {**metas([f for f in movers if f not in member_meta]),
                **{f: member_meta[f] for f in movers if f in member_meta}}
    vecs = vectors([base.keeper, *movers])
    joined = [f for f in movers if f in meta and f in vecs and base.keeper in vecs]
    if not joined:
        return groups
    kmeta = next(m.meta for m in base.members if m.id == base.keeper)
    members = list(base.members)
    for f in joined:
        similarity = float(np.dot(np.asarray(vecs[f], np.float64), np.asarray(vecs[base.keeper], np.float64)))
        members.append(Member(f, _tier_to_keeper(meta[f], kmeta), round(similarity, 6), meta[f]))
    rank = TIERS.index
    members.sort(key=lambda x: (x.id != base.keeper, rank(x.tier), -x.similarity, x.id))
    tier = TIERS[max(rank(base.tier), *(rank(m.tier) for m in members))]
    group = Group(group_id(m.id for m in members), tier, base.keeper, members)
    return [g for n, g in enumerate(groups) if n != found] + [group]


def _tier_to_keeper(meta: ImageMeta, keeper: ImageMeta) -> str:
    if meta.content_hash == keeper.content_hash:
        return "same-bytes"
    if meta.pixel_hash and meta.pixel_hash == keeper.pixel_hash:
        return "same-pixels"
    return PERSON


# ---------------------------------------------------------------- the groups as they stand now

@dataclass
class CurrentGroups:
    generation: object  # generations.Generation
    groups: list[Group]
    threshold: float | None  # None: the generation's own groups
    verdicts: PairVerdicts


def store_lookups(catalog, model: str, whitening) -> tuple[Vectors, Metas]:
    """`vectors` and `metas` for apply_verdicts from a catalog: stored vectors under `model` in the
    generation's space (its `whitening` applied), and the catalog's metadata of present files."""

    def vectors(ids: Sequence[int]) -> dict[int, np.ndarray]:
        stored = catalog.file_vectors(ids, model)
        keys = sorted(stored)
        if not keys:
            return {}
        return dict(zip(keys, whitening.apply(np.stack([stored[k] for k in keys]))))

    def metas(ids: Sequence[int]) -> dict[int, ImageMeta]:
        return {i: ImageMeta(**m) for i, m in catalog.image_meta(ids).items()}

    return vectors, metas


def judged_groups(catalog, groups: list[Group], *, model: str, whitening, t_near: float, t_similar: float,
                  verdicts: PairVerdicts | None = None) -> list[Group]:
    """A generation's `groups` (built from vectors of `model` in the space `whitening` maps them to,
    at `t_near`, `t_similar`) with the catalog's latest verdicts applied."""
    verdicts = PairVerdicts.from_rows(catalog.latest_verdict_files()) if verdicts is None else verdicts
    if not verdicts:
        return groups
    vectors, metas = store_lookups(catalog, model, whitening)
    return apply_verdicts(groups, verdicts, vectors=vectors, metas=metas, t_near=t_near, t_similar=t_similar)


def current_groups(store, *, threshold: float | None = None, precision: float | None = None) -> CurrentGroups:
    """The current generation's groups, or groups regrouped at a threshold (given, or read off the
    calibration for `precision`), with a person's latest verdicts applied: what `groups`, the service
    and the quarantine plan all show and act on."""
    from ..matching.generations import require_current

    gen = require_current(store)
    threshold = gen.asked_threshold(threshold, precision)
    verdicts = PairVerdicts.from_rows(store.catalog.latest_verdict_files())
    whitening = gen.load_whitening() if verdicts or threshold is not None else None
    if threshold is None:
        groups = [Group.from_dict(g) for g in gen.load_groups()["groups"]]
        t_near, t_similar = float(gen.meta["thresholds"]["near"]), float(gen.meta["thresholds"]["similar"])
    else:
        from ..core.limits import THRESHOLD

        THRESHOLD.check(threshold)
        if threshold < float(gen.meta["thresholds"]["near"]):
            log.warning("threshold %.3f is below the generation's duplicate threshold %.3f: check the groups "
                        "before acting on them", threshold, gen.meta["thresholds"]["near"])
        from .build import Space, regroup, whitened_vectors  # regrouping needs the index; listing does not

        ids, xb = whitened_vectors(store, gen.meta["model"], whitening)
        # Both tiers at the asked threshold; verified neighbours count from the generation's own floor, as in
        # the nightly build, so that an edited copy the build joined on geometric evidence stays joined.
        asked = {"near": threshold, "similar": threshold}
        if "verify_floor" in gen.meta["thresholds"]:
            asked["verify_floor"] = min(threshold, float(gen.meta["thresholds"]["verify_floor"]))
        stored = gen.load_pairs()  # None for a generation from before pairs were kept: searched and verified anew
        known = None if stored is None else (*stored, float(gen.meta["thresholds"]["similar"]))
        # The index is read only when pairs must be searched: above the stored pairs' floor they are all known.
        searched = known is None or threshold < known[3]
        _pairs, groups = regroup(store, Space(gen.load_index() if searched else None, ids, xb, whitening), asked,
                                 known=known)
        t_near = t_similar = threshold
    groups = judged_groups(store.catalog, groups, model=gen.meta["model"], whitening=whitening, t_near=t_near,
                           t_similar=t_similar, verdicts=verdicts)
    return CurrentGroups(gen, groups, threshold, verdicts)
