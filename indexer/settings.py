"""The one table of settings.

Each setting has a name, a default, a parser and a line of help. Values are
resolved in this order, later winning: the default, the store's
``settings.toml`` (or a file named with ``--config``), the environment
(``NEARSIGHT_<NAME>``), then command-line flags. The same table feeds the CLI's
``nearsight settings`` listing and the settings table in DEVELOPERS.md.
"""

from __future__ import annotations

import os
import tomllib
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable, Mapping

from .errors import UsageError

ENV_PREFIX = "NEARSIGHT_"
SETTINGS_FILE = "settings.toml"


def _parse_bool(value: Any) -> bool:
    if isinstance(value, bool):
        return value
    text = str(value).strip().lower()
    if text in {"1", "true", "yes", "on"}:
        return True
    if text in {"0", "false", "no", "off"}:
        return False
    raise ValueError(f"expected true or false, got {value!r}")


def _parse_extensions(value: Any) -> tuple[str, ...]:
    items = value if isinstance(value, (list, tuple)) else str(value).split(",")
    exts = []
    for item in items:
        ext = str(item).strip().lower()
        if ext:
            exts.append(ext if ext.startswith(".") else "." + ext)
    return tuple(exts)


def _positive_int(value: Any) -> int:
    number = int(value)
    if number < 0:
        raise ValueError(f"expected a whole number >= 0, got {value!r}")
    return number


def _positive_float(value: Any) -> float:
    number = float(value)
    if not number > 0:
        raise ValueError(f"expected a number > 0, got {value!r}")
    return number


def _unit_float(value: Any) -> float:
    number = float(value)
    if not -1.0 <= number <= 1.0:
        raise ValueError(f"expected a cosine similarity between -1 and 1, got {value!r}")
    return number


@dataclass(frozen=True)
class Setting:
    name: str
    default: Any
    parse: Callable[[Any], Any]
    help: str


SETTINGS: tuple[Setting, ...] = (
    Setting(
        "extensions",
        ".jpg,.jpeg,.jpe,.jfif,.png,.gif,.bmp,.dib,.tif,.tiff,.webp,.ppm,.pgm,.pbm,.pnm,.tga,.heic,.heif,.avif",
        _parse_extensions,
        "File name endings treated as images when scanning (comma-separated). "
        "Other files are counted as ignored, not recorded.",
    ),
    Setting(
        "skip_hidden",
        True,
        _parse_bool,
        "Skip files and folders whose names start with a dot while scanning.",
    ),
    Setting(
        "max_pixels",
        250_000_000,
        _positive_int,
        "Decompression-bomb limit: an image whose header claims more pixels than "
        "this is recorded as too-large and never decoded.",
    ),
    Setting(
        "thumb_side",
        256,
        _positive_int,
        "Longest side in pixels of the small copy cached for every readable image at scan "
        "time (training, embedding and thumbnails read it instead of the original); 0 disables.",
    ),
    Setting(
        "workers",
        0,
        _positive_int,
        "Worker processes for hashing and decoding; 0 means one per CPU core.",
    ),
    Setting(
        "train_minutes",
        10.0,
        _positive_float,
        "Training budget in minutes when `index` finds no model in the store.",
    ),
    Setting(
        "near_threshold",
        0.50,
        _unit_float,
        "Cosine similarity (of whitened descriptors) at or above which a pair is called a "
        "near-duplicate, until a calibration exists. Measured on the demo archive after 3 minutes "
        "of training: pair precision 0.98, recall 0.61 (see DEVELOPERS.md).",
    ),
    Setting(
        "similar_threshold",
        0.30,
        _unit_float,
        "Looser cosine similarity for the 'similar' tier of groups, until a calibration exists.",
    ),
    Setting(
        "keep_generations",
        3,
        _positive_int,
        "Published index generations kept on disk (the current one always stays).",
    ),
)

_BY_NAME = {s.name: s for s in SETTINGS}


class Settings(Mapping[str, Any]):
    """Resolved settings with attribute access and a record of where each came from."""

    def __init__(self, values: dict[str, Any], sources: dict[str, str]):
        self._values = dict(values)
        self._sources = dict(sources)

    def __getitem__(self, name: str) -> Any:
        return self._values[name]

    def __iter__(self):
        return iter(self._values)

    def __len__(self) -> int:
        return len(self._values)

    def __getattr__(self, name: str) -> Any:
        try:
            return self._values[name]
        except KeyError:
            raise AttributeError(name) from None

    def source(self, name: str) -> str:
        return self._sources[name]


def _parse(setting: Setting, raw: Any, origin: str) -> Any:
    try:
        return setting.parse(raw)
    except (TypeError, ValueError) as exc:
        raise UsageError(f"setting {setting.name} from {origin}: {exc}") from None


def load_settings(
    store_dir: Path | None = None,
    config_file: Path | None = None,
    environ: Mapping[str, str] | None = None,
    overrides: Mapping[str, Any] | None = None,
) -> Settings:
    """Resolve every setting: defaults, then file, then environment, then overrides."""
    environ = os.environ if environ is None else environ
    values = {s.name: s.parse(s.default) for s in SETTINGS}
    sources = {s.name: "default" for s in SETTINGS}

    path = config_file or (Path(store_dir) / SETTINGS_FILE if store_dir else None)
    if config_file is not None and not Path(config_file).is_file():
        raise UsageError(f"settings file not found: {config_file}")
    if path is not None and Path(path).is_file():
        try:
            data = tomllib.loads(Path(path).read_text(encoding="utf-8"))
        except (OSError, tomllib.TOMLDecodeError) as exc:
            raise UsageError(f"cannot read settings file {path}: {exc}") from None
        for name, raw in data.items():
            if name not in _BY_NAME:
                raise UsageError(f"unknown setting {name!r} in {path}")
            values[name] = _parse(_BY_NAME[name], raw, str(path))
            sources[name] = str(path)

    for setting in SETTINGS:
        key = ENV_PREFIX + setting.name.upper()
        if key in environ:
            values[setting.name] = _parse(setting, environ[key], key)
            sources[setting.name] = key

    for name, raw in (overrides or {}).items():
        if raw is None:
            continue
        if name not in _BY_NAME:
            raise UsageError(f"unknown setting {name!r}")
        values[name] = _parse(_BY_NAME[name], raw, "command line")
        sources[name] = "command line"
    return Settings(values, sources)


def describe() -> list[dict[str, str]]:
    """The settings table as rows (name, default, environment variable, help)."""
    return [
        {
            "name": s.name,
            "default": str(s.default),
            "env": ENV_PREFIX + s.name.upper(),
            "help": s.help,
        }
        for s in SETTINGS
    ]
