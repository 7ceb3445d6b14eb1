"""Keeper rules: which member of a duplicate group stays where it is.

The policy, first difference wins:

0. a person's choice (the review page's "keep this one", indexer/acting/picks.py): the
   member picked most recently;
1. always-kept paths (setting `keep_paths`, flag `--keep`): a member matching one
   is never moved, even when that leaves a group with two or more files;
2. folder priorities (`prefer_folders`, `--prefer-folder`): the member under the
   earliest-listed folder pattern wins; members under none come last;
3. format priorities (`prefer_formats`, `--prefer-format`): the member whose
   format is listed earliest wins; unlisted formats come last;
4. the default policy (`groups.keeper_key`): the camera's EXIF record (capture
   time, make and model), most pixels, an ICC profile, a lossless format, the
   earlier capture, the older modification time, the shallower path, the larger
   file, the path.

A pattern is a path or a glob (``*``, ``?``, ``[...]``) compared one path
component at a time, so ``*`` never crosses a ``/``. An absolute pattern is
anchored at the root (``/archive/masters`` matches everything under that folder);
a relative one matches any run of consecutive components (``masters`` matches
any folder or file named so, ``*.png`` any PNG file name, ``2019/raw`` any
``raw`` folder directly inside a ``2019`` folder).
"""

from __future__ import annotations

import os
from dataclasses import dataclass, replace
from fnmatch import fnmatchcase
from pathlib import PurePosixPath
from typing import Iterable, Mapping

from ..core.errors import UsageError
from ..matching.groups import ImageMeta, keeper_key

# File-name endings and Pillow format names that mean the same format.
FORMAT_ALIASES = {"jpg": "jpeg", "jpe": "jpeg", "jfif": "jpeg", "tif": "tiff"}


def normalize_format(name: str) -> str:
    """'PNG', '.png' and 'png' are one format; 'jpg' and 'JPEG' too."""
    text = str(name).strip().lower().lstrip(".")
    return FORMAT_ALIASES.get(text, text)


def path_matches(pattern: str, path: str) -> bool:
    """Does `pattern` name `path` or one of the folders above it (see the module docstring)?"""
    pattern = pattern.strip()
    if not pattern:
        return False
    want = PurePosixPath(pattern).parts
    have = PurePosixPath(path).parts
    if pattern.startswith("/"):
        starts: Iterable[int] = (0,)
    else:
        starts = range(len(have) - len(want) + 1)
    for start in starts:
        window = have[start:start + len(want)]
        if len(window) == len(want) and all(fnmatchcase(h, w) for h, w in zip(window, want)):
            return True
    return False


def _clean(values, what: str) -> tuple[str, ...]:
    if isinstance(values, str):
        values = values.split(",")
    out = []
    for value in values or ():
        if not isinstance(value, str):
            raise UsageError(f"{what} must be text, not {value!r}")
        if value.strip():
            out.append(value.strip())
    return tuple(out)


# What each place of KeeperRules.sort_key means (a person's pick, the three rules, then groups.keeper_key's ten
# places), said of the keeper when that place decided.
_REASONS = (
    lambda m: "was chosen by a person (keep this one, on the review page)",
    lambda m: "is always kept (keep_paths)",
    lambda m: "is under a preferred folder (prefer_folders)",
    lambda m: f"is in a preferred format, {m.format} (prefer_formats)",
    lambda m: f"still has the camera's capture time ({m.captured})",
    lambda m: f"still names its camera ({m.camera})",
    lambda m: f"has the most pixels ({m.width} x {m.height})",
    lambda m: "has an ICC colour profile",
    lambda m: f"is in a lossless format ({m.format})",
    lambda m: f"was captured earliest ({m.captured})",
    lambda m: "is the oldest file (modification time)",
    lambda m: "is the least deeply filed copy (shortest folder path)",
    lambda m: f"is the largest file ({m.file_size} bytes: the least compressed)",
    lambda m: "comes first by path (the copies are otherwise alike)",
)


@dataclass(frozen=True)
class KeeperRules:
    """Who stays: always-kept patterns, then folder and format priorities, then the default."""

    keep_paths: tuple[str, ...] = ()
    prefer_folders: tuple[str, ...] = ()
    prefer_formats: tuple[str, ...] = ()
    picks: tuple[tuple[str, float], ...] = ()  # (full path, time) of files a person chose to keep

    def __post_init__(self):
        object.__setattr__(self, "keep_paths", _clean(self.keep_paths, "keep_paths"))
        object.__setattr__(self, "prefer_folders", _clean(self.prefer_folders, "prefer_folders"))
        formats = tuple(normalize_format(f) for f in _clean(self.prefer_formats, "prefer_formats"))
        object.__setattr__(self, "prefer_formats", formats)
        object.__setattr__(self, "_picked", dict(self.picks))

    @classmethod
    def from_settings(cls, settings: Mapping) -> "KeeperRules":
        return cls(settings["keep_paths"], settings["prefer_folders"], settings["prefer_formats"])

    def with_picks(self, picks: Mapping[str, float]) -> "KeeperRules":
        """These rules with a person's picks (full path -> time of the pick, indexer/acting/picks.py) first."""
        return replace(self, picks=tuple(sorted(picks.items())))

    def always_kept(self, path: str) -> bool:
        return any(path_matches(p, path) for p in self.keep_paths)

    def folder_rank(self, path: str) -> int:
        return next((i for i, p in enumerate(self.prefer_folders) if path_matches(p, path)), len(self.prefer_folders))

    def format_rank(self, meta: ImageMeta) -> int:
        names = {normalize_format(meta.format)} if meta.format else set()
        names.add(normalize_format(os.path.splitext(meta.path)[1]))
        return next((i for i, f in enumerate(self.prefer_formats) if f in names), len(self.prefer_formats))

    def sort_key(self, meta: ImageMeta) -> tuple:
        """Smaller wins: the latest pick, always kept, then folder rank, then format rank, then the default
        policy."""
        return (-self._picked.get(meta.path, 0.0), not self.always_kept(meta.path), self.folder_rank(meta.path),
                self.format_rank(meta), *keeper_key(meta))

    def reason(self, keeper: ImageMeta, others: Iterable[ImageMeta]) -> str:
        """Why `keeper` was chosen over `others`, in plain words: the rule that decided against the member
        that came closest (the first place where their sort keys differ)."""
        mine = self.sort_key(keeper)
        closest = min((self.sort_key(m) for m in others), default=None)
        if closest is None:
            return "is the only file of its group"
        at = next((i for i, (a, b) in enumerate(zip(mine, closest)) if a != b), len(mine) - 1)
        return _REASONS[min(at, len(_REASONS) - 1)](keeper)

    def choose(self, candidates: Mapping[int, ImageMeta]) -> int:
        """The keeper's id among `candidates` (id -> meta); ties go to the smaller id."""
        if not candidates:
            raise UsageError("a group needs at least one file to choose a keeper from")
        return min(candidates, key=lambda ident: (self.sort_key(candidates[ident]), ident))

    def to_dict(self) -> dict:
        return {"keep_paths": list(self.keep_paths), "prefer_folders": list(self.prefer_folders),
                "prefer_formats": list(self.prefer_formats), "picked": [path for path, _ in self.picks]}
