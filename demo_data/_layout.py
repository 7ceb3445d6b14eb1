"""Where everything goes in the demo archive: which originals get which planted files, and their names.

`plan_archive` decides kinds, folders and file names only (cheap, deterministic);
the pixels and the edit parameters are decided when the files are made.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field

import numpy as np

from ._scenes import COMPOSITIONS, SEASONS, TONES
from ._variants import NEAR_KINDS

ROOT = "quillon-ford-archive"

# Shares of the originals that get each kind of planted file (see README.md).
NEAR_SHARE, EXACT_SHARE, SAME_SHARE, LOOKALIKE_SHARE = 0.40, 0.10, 0.08, 0.15
FOLDER_DECK = ["masters"] * 4 + ["scans-1987"] * 11 + ["donations"] * 5
MEMBERS = ("hjd", "mt-album", "rb_box2", "wk")

PLACES = {"lakeside": ("Mill pond", "Reed lake", "Heron shore", "Boathouse cove", "Upper reservoir"),
          "village": ("Church lane", "Upper green", "Wheelwright row", "Orchard cottages", "Quillon Ford green"),
          "river-bridge": ("Old stone bridge", "Ford crossing", "Weir bridge", "Towpath arches", "Packhorse bridge"),
          "farmland": ("North meadow", "Barley fields", "Hollow farm", "Ridge pasture", "Long acre"),
          "street": ("High street", "Market corner", "Station road", "Bakery row", "Chandlers yard"),
          "woods": ("Beech wood path", "Chapel copse", "Quarry track", "Fern hollow", "Keeper's ride")}
EVENTS = {"spring": ("spring fair", "May morning", "after the rain", "blossom week"),
          "summer": ("summer fete", "regatta day", "sunday outing", "haymaking"),
          "autumn": ("harvest supper", "market day", "lantern walk", "leaf fall"),
          "winter": ("first snow", "carol night", "frost fair", "new year walk")}


class Names:
    """Hands out unique relative paths and each donor folder's own numbering style."""

    def __init__(self, rng: np.random.Generator):
        self.taken: set[str] = set()
        self.counter = {m: int(rng.integers(1, 40)) for m in MEMBERS}

    def claim(self, path: str) -> str:
        stem, _, ext = path.rpartition(".")
        candidate, n = path, 2
        while candidate in self.taken:
            candidate, n = f"{stem}_{n}.{ext}", n + 1
        self.taken.add(candidate)
        return candidate

    def donation(self, member: str) -> str:
        n = self.counter[member]
        self.counter[member] += 2  # every number is followed by a free one for a possible burst frame
        return self.claim(self._donation_name(member, n))

    def next_frame(self, path: str) -> str:
        member = path.split("/")[-2]
        return self.claim(self._donation_name(member, self._number(path) + 1))

    @staticmethod
    def _donation_name(member: str, n: int) -> str:
        name = {"hjd": f"roll{n // 36 + 1:02d}_{n % 36 + 1:02d}.jpg",
                "mt-album": f"album page {n // 4 + 1} - {n % 4 + 1}.jpg",
                "rb_box2": f"RB{n:04d}.JPG",
                "wk": f"scan{n:03d}.jpeg"}[member]
        return f"{ROOT}/donations/{member}/{name}"

    @staticmethod
    def _number(path: str) -> int:
        member, name = path.split("/")[-2:]
        digits = [int(d) for d in re.findall(r"\d+", name)]
        if member == "hjd":
            return (digits[0] - 1) * 36 + digits[1] - 1
        if member == "mt-album":
            return (digits[0] - 1) * 4 + digits[1] - 1
        return digits[-1]


@dataclass
class Photo:
    """One original and everything planted from it: what and where. How (pixels, edit params) is decided when made."""

    index: int
    composition: str
    tone: str
    season: str
    folder: str
    path: str
    title: str
    quality: int | None  # JPEG quality; None for a PNG master
    orientation: int | None = None
    copies: list[dict] = field(default_factory=list)
    lookalike: str | None = None

    @property
    def format(self) -> str:
        return "png" if self.quality is None else "jpeg"


def _deck(rng: np.random.Generator, items, n: int) -> list:
    """n items dealt from repeatedly shuffled copies of `items`, so every item appears about equally often."""
    out = []
    while len(out) < n:
        out += [items[i] for i in rng.permutation(len(items))]
    return out[:n]


def _some(rng: np.random.Generator, pool: list[int], share: float, of: int | None = None) -> list[int]:
    """A sorted random subset of `pool` holding `share` of `of` (default: of the pool) items."""
    count = min(round(share * (of if of is not None else len(pool))), len(pool))
    return sorted(int(i) for i in rng.permutation(pool)[:count])


def _deal_distinct(deck: list[str], wanted: int) -> list[str]:
    """Take up to `wanted` different kinds off the front of `deck`; repeats go to its back."""
    picked: list[str] = []
    for _ in range(len(deck)):
        if len(picked) == wanted:
            break
        kind = deck.pop(0)
        if kind in picked:
            deck.append(kind)
        else:
            picked.append(kind)
    return picked


def _slug(text: str) -> str:
    return re.sub(r"[^a-z0-9]+", "_", text.lower()).strip("_")


def _stem(path: str) -> str:
    return path.rsplit("/", 1)[-1].rsplit(".", 1)[0]


def plan_archive(seed: int, originals: int) -> list[Photo]:
    """Decide every original and planted file: kinds, folders, names. Cheap and deterministic."""
    rng = np.random.default_rng([seed, 0, 0])
    names = Names(rng)
    compositions, tones = _deck(rng, COMPOSITIONS, originals), _deck(rng, TONES, originals)
    seasons, folders = _deck(rng, SEASONS, originals), _deck(rng, FOLDER_DECK, originals)
    photos = []
    for i in range(originals):
        acc, comp, folder, season = i + 1, compositions[i], folders[i], seasons[i]
        title = f"{PLACES[comp][int(rng.integers(5))]}, {EVENTS[season][int(rng.integers(4))]}"
        if folder == "masters":
            path, quality = names.claim(f"{ROOT}/masters/qf_{acc:04d}_master.png"), None
        elif folder == "scans-1987":
            path, quality = names.claim(f"{ROOT}/scans-1987/qf_{acc:04d}.jpg"), int(rng.integers(88, 96))
        else:
            path, quality = names.donation(MEMBERS[int(rng.integers(len(MEMBERS)))]), int(rng.integers(75, 93))
        photos.append(Photo(i, comp, tones[i], season, folder, path, title, quality))

    donated = [p for p in photos if p.folder == "donations"]
    turned = max(round(0.2 * len(donated)), 1) if donated else 0  # stored turned, with an EXIF orientation tag
    for k, i in enumerate(rng.permutation(len(donated))[:turned]):
        donated[i].orientation = (6, 8, 3)[k % 3]
    every = [p.index for p in photos]
    near, exact = _some(rng, every, NEAR_SHARE), _some(rng, every, EXACT_SHARE)
    same = _some(rng, [p.index for p in photos if p.orientation is None], SAME_SHARE, originals)
    looks = _some(rng, every, LOOKALIKE_SHARE)
    kinds = _deck(rng, NEAR_KINDS, 3 * len(near))
    for i in near:
        for kind in _deal_distinct(kinds, int(rng.integers(1, 4))):
            photos[i].copies.append({"kind": kind, "path": _near_path(names, rng, photos[i], kind)})
    for i in exact:
        photos[i].copies.append({"kind": "exact-copy", "path": _copy_path(names, rng, photos[i])})
    for i in same:
        photos[i].copies.append({"kind": "same-pixels", "path": _lossless_path(names, rng, photos[i])})
    for i in looks:
        photos[i].lookalike = _lookalike_path(names, photos[i], originals)
    return photos


def _near_path(names: Names, rng, photo: Photo, kind: str) -> str:
    slug, stem = _slug(photo.title), _stem(photo.path)
    member = MEMBERS[int(rng.integers(len(MEMBERS)))]
    news = f"{ROOT}/newsletter-exports"
    choices = {
        "recompressed": (f"{ROOT}/donations/{member}/{slug}.jpg", f"{ROOT}/duplicates-of-scans/{stem}_email.jpg"),
        "resized": (f"{news}/{slug}_web.jpg", f"{news}/{slug}_small.jpg"),
        "cropped": (f"{news}/{slug}_crop.jpg", f"{news}/{slug}_detail.jpg"),
        "colour-edited": (f"{ROOT}/donations/{member}/{slug}_edit.jpg", f"{news}/{slug}_bright.jpg"),
        "captioned": (f"{news}/{slug}_caption.jpg", f"{news}/{slug}_titled.jpg"),
        "bordered": (f"{news}/{slug}_mounted.png", f"{news}/{slug}_mounted.jpg"),
        "rotated": (f"{ROOT}/duplicates-of-scans/{stem}_rescan.jpg", f"{ROOT}/duplicates-of-scans/{stem}_scan2.jpg"),
    }
    if kind == "burst":
        if photo.folder == "donations":
            return names.next_frame(photo.path)
        return names.claim(re.sub(r"qf_(\d{4})", r"qf_\1b", photo.path, count=1))
    return names.claim(choices[kind][int(rng.integers(2))])


def _copy_path(names: Names, rng, photo: Photo) -> str:
    name = photo.path.rsplit("/", 1)[-1]
    if photo.folder == "masters":
        return names.claim(f"{ROOT}/masters/backup/{name}")
    if photo.folder == "donations" and rng.random() < 0.5:
        others = [m for m in MEMBERS if m != photo.path.split("/")[-2]]
        return names.claim(f"{ROOT}/donations/{others[int(rng.integers(len(others)))]}/{name}")
    stem, ext = name.rsplit(".", 1)
    return names.claim(f"{ROOT}/duplicates-of-scans/{name if rng.random() < 0.5 else f'{stem} (2).{ext}'}")


def _lossless_path(names: Names, rng, photo: Photo) -> str:
    stem = _stem(photo.path)
    if photo.folder == "masters":
        options = (f"{ROOT}/masters/{stem}.tif", f"{ROOT}/duplicates-of-scans/{stem}.bmp",
                   f"{ROOT}/duplicates-of-scans/{stem}_resave.png")
    else:
        options = (f"{ROOT}/masters/{stem}.tif", f"{ROOT}/masters/{stem}_lossless.png",
                   f"{ROOT}/duplicates-of-scans/{stem}.bmp")
    return names.claim(options[int(rng.integers(3))])


def _lookalike_path(names: Names, photo: Photo, originals: int) -> str:
    if photo.folder == "donations":
        return names.donation(photo.path.split("/")[-2])
    acc = originals + photo.index + 1
    if photo.folder == "masters":
        return names.claim(f"{ROOT}/masters/qf_{acc:04d}_master.png")
    return names.claim(f"{ROOT}/scans-1987/qf_{acc:04d}.jpg")
