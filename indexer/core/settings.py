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


def _region_grid(value: Any) -> int:
    number = int(value)
    if not 0 <= number <= 4:
        raise ValueError(f"expected a whole number from 0 (off) to 4, got {value!r}")
    return number


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


def _parse_list(value: Any) -> tuple[str, ...]:
    """A TOML list, or comma-separated text (from a file, the environment or a flag)."""
    items = value if isinstance(value, (list, tuple)) else str(value).split(",")
    return tuple(str(item).strip() for item in items if str(item).strip())


def _port(value: Any) -> int:
    number = int(value)
    if not 0 <= number <= 65535:
        raise ValueError(f"expected a TCP port 0-65535 (0: any free port), got {value!r}")
    return number


def _api_key(value: Any) -> str:
    text = str(value).strip()
    if text and len(text) < 16:
        raise ValueError("an API key needs at least 16 characters (shorter keys are easy to guess)")
    return text


def _origins(value: Any) -> tuple[str, ...]:
    items = value if isinstance(value, (list, tuple)) else str(value).split(",")
    return tuple(str(item).strip().rstrip("/") for item in items if str(item).strip())


MIRROR_MODES = ("off", "verified", "max")
RUNTIMES = ("auto", "onnx", "torch")  # what runs the encoder (indexer/learning/runtime.py)


def _mirror_mode(value: Any) -> str:
    text = str(value).strip().lower()
    if text not in MIRROR_MODES:
        raise ValueError(f"expected one of {', '.join(MIRROR_MODES)}, got {value!r}")
    return text


def _runtime(value: Any) -> str:
    text = str(value).strip().lower()
    if text not in RUNTIMES:
        raise ValueError(f"expected one of {', '.join(RUNTIMES)}, got {value!r}")
    return text


def _fraction(value: Any) -> float:
    number = float(value)
    if not number >= 0:
        raise ValueError(f"expected a fraction >= 0 (0.2 = 20%), got {value!r}")
    return number


def _share(value: Any) -> float:
    number = float(value)
    if not 0.0 <= number <= 1.0:
        raise ValueError(f"expected a share between 0 and 1 (0.5 = half), got {value!r}")
    return number


def _unit_float(value: Any) -> float:
    number = float(value)
    if not -1.0 <= number <= 1.0:
        raise ValueError(f"expected a cosine similarity between -1 and 1, got {value!r}")
    return number


def _precision(value: Any) -> float:
    number = float(value)
    if not 0.5 <= number < 1.0:
        raise ValueError(f"expected a precision in [0.5, 1), got {value!r}")
    return number


def _open_share(value: Any) -> float:
    number = float(value)
    if not 0.0 < number < 0.5:
        raise ValueError(f"expected a share between 0 and 0.5 (0.01 = 1%), got {value!r}")
    return number


def _probability(value: Any) -> float:
    number = float(value)
    if not 0.0 < number < 1.0:
        raise ValueError(f"expected a probability between 0 and 1 (exclusive), got {value!r}")
    return number


@dataclass(frozen=True)
class Setting:
    name: str
    default: Any
    parse: Callable[[Any], Any]
    help: str
    secret: bool = False  # listings show whether it is set, never the value


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
        "train_sample",
        10_000,
        _positive_int,
        "Training uses a random sample of at most this many images, so its cost does not grow "
        "with the collection.",
    ),
    Setting(
        "verify_top",
        3,
        _positive_int,
        "Candidates of each query (similar, the service) checked by geometric verification (ORB "
        "keypoints under one similarity transform, on the small copies); a verified candidate's score "
        "moves halfway to 1. 0 turns it off. Measured: top 3 lifted µAP 0.885 -> 0.941 (benchmarks/results/"
        "ablation.md); the cost per query is in benchmarks/results/query.md.",
    ),
    Setting(
        "verify_more",
        12,
        _positive_int,
        "When a query's best candidate is not verified after the first verify_top, this many more are "
        "verified (a hard crop often ranks its original a little lower). Measured on the quality "
        "benchmark: µAP 0.925 -> 0.945, crops' recall@1 0.72 -> 0.80; 0 turns it off.",
    ),
    Setting(
        "verify_fine",
        6,
        _positive_int,
        "When a query's best candidate is still not verified after verify_more, its first this many "
        "unconfirmed candidates are checked again with the candidate's small copy at twice the side and "
        "four times the keypoints, so that a hard crop meets its original at its own scale. 0 turns it off.",
    ),
    Setting(
        "region_grid",
        3,
        _region_grid,
        "Region descriptors per indexed image: a grid x grid layout of overlapping parts, each half the "
        "image's width and height, embedded at index time (indexer/matching/regions.py). A query whose best "
        "candidate is not verified also searches them, so that a crop keeping a fifth of a photo still "
        "finds it. Costs grid x grid more encoder passes per image and vectors in the generation; "
        "0 turns it off. Measured: crops' recall@1 0.833 -> 0.914 with 3.",
    ),
    Setting(
        "runtime",
        "auto",
        _runtime,
        "What runs the trained encoder for queries, the service and embedding: auto (ONNX Runtime on the "
        "model's exported model.onnx when both are there, else PyTorch), onnx (refuse to go on without it) "
        "or torch. ONNX Runtime answers without importing PyTorch, which is most of a one-image `similar`'s "
        "start-up; the vectors are the same to about 2e-5.",
    ),
    Setting(
        "keep_keypoints",
        True,
        _parse_bool,
        "Find every small copy's ORB keypoints at index time and keep them beside it "
        "(thumbs/ab/<hash>.kp, indexer/matching/keypoints.py), so that verifying a query's candidates reads them "
        "instead of finding them. Costs about 70 KiB an image on disk and 5 to 10 ms of one core an image "
        "while indexing; answers are the same either way.",
    ),
    Setting(
        "shared_part",
        0.5,
        _share,
        "Groups: two files that each match the same part of a third on strong keypoint evidence (twice the "
        "inliers verification needs) count as a confirmed pair when their footprints in the third share at "
        "least this much of the smaller one, so an original's fogged copy and its tight crop share its "
        "group though ORB cannot match them with each other. Two halves of a photo share nothing and stay "
        "apart. Only inside components small enough to verify whole; 0 turns it off.",
    ),
    Setting(
        "verify_regions",
        6,
        _positive_int,
        "How many candidates found through region descriptors (not already among the first verify_top) "
        "are verified, for a query whose best candidate is still not verified.",
    ),
    Setting(
        "score_norm",
        1.0,
        _fraction,
        "Query-adaptive score normalisation for similar and the service: beta times the mean of the "
        "query's similarities ranked 2-11 in the collection is subtracted from its scores, so a score "
        "means the same whatever the query resembles. 0 turns it off. Measured with verification: "
        "recall at precision 0.99 0.70 -> 0.85 (benchmarks/results/ablation.md).",
    ),
    Setting(
        "frame_views",
        True,
        _parse_bool,
        "A query image with a uniform frame (a border, letterbox bars) is also searched as the picture "
        "inside it, and each candidate keeps the better score (indexer/matching/frames.py). false turns it off.",
    ),
    Setting(
        "same_frame",
        True,
        _parse_bool,
        "A candidate that keypoints do not confirm is compared with the query pixel for pixel where both "
        "frames have the same shape: their band-passed 64 x 64 grey images must correlate at 0.75 or more "
        "(indexer/matching/aligned.py). It confirms copies whose corners an edit wiped out (heavy JPEG, "
        "noise, blur, fog, strong brightness). false turns it off.",
    ),
    Setting(
        "haze_view",
        False,
        _parse_bool,
        "A query whose best candidate is still unverified after every other view, and that looks hazy (a "
        "tenth of its dark channel is bright), is also searched dehazed by the dark channel prior "
        "(indexer/matching/haze.py); the candidates the dehazed image verifies join its answer. Measured "
        "on the quality benchmark (benchmarks/results/haze.md): fogged copies' recall@1 0.48 -> 0.53, "
        "overall 0.970 -> 0.971, for about 1.1 ms more a query (18.8 -> 20.0 ms), so it is off by default.",
    ),
    Setting(
        "query_regions",
        True,
        _parse_bool,
        "A query whose best candidate did not verify is also cut into the same grid of parts as the indexed "
        "images' region descriptors (region_grid), and each part searched among them, so that a copy with a "
        "large part covered or cut away meets its original part to part (indexer/matching/regions.py). A "
        "candidate found so keeps its place only when verified. false turns it off.",
    ),
    Setting(
        "mirror_view",
        "verified",
        _mirror_mode,
        "Queries are also searched as their mirror image. verified: a candidate found through the mirror "
        "counts only when geometric verification confirms a mirrored copy; max: a candidate keeps the "
        "better of its two scores; off: the image as given only.",
    ),
    Setting(
        "ask_pairs",
        True,
        _parse_bool,
        "When groups are made, every indexed file is also asked as a query (its other views, the region "
        "descriptors, more verification, as similar asks) and a result that geometric verification confirms on "
        "at least twice the inliers it needs joins the pairs: mirrored, turned, tightly cropped and framed "
        "copies reach their groups. Measured on the quality benchmark's photos with planted copies: pair recall "
        "0.730 -> 0.808 at precision 0.999 (benchmarks/results/groups-real.md); costs about 13 ms per file on "
        "2 cores. false turns it off.",
    ),
    Setting(
        "turned_views",
        True,
        _parse_bool,
        "A query whose best candidate is not verified is also searched turned a quarter-turn either way, "
        "as a photo whose orientation tag was lost stands to its original; what those views find counts "
        "only when it scores like a near-duplicate turned back and geometric verification confirms it. "
        "Costs two more encoder passes for such queries only; false turns it off.",
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
        "target_precision",
        0.99,
        _precision,
        "Precision the calibrated near-duplicate threshold aims at: the estimated share of pairs "
        "called near-duplicates that really are (see `nearsight calibrate`).",
    ),
    Setting(
        "similar_target_precision",
        0.90,
        _precision,
        "Precision the calibrated (looser) similar-tier threshold aims at.",
    ),
    Setting(
        "false_flag_rate",
        0.01,
        _open_share,
        "Share of queries whose original is not in the collection that may get a wrong result "
        "flagged as a duplicate: the calibrated query verdict's threshold keeps the upper end of "
        "its 95 % interval within this (see `nearsight calibrate`).",
    ),
    Setting(
        "copy_prior",
        0.5,
        _probability,
        "Share of queries assumed to be copies of an indexed image when each result's "
        "`probability` is calibrated (0.5: as likely a copy as not).",
    ),
    Setting(
        "keep_generations",
        3,
        _positive_int,
        "Published index generations kept on disk (the current one always stays).",
    ),
    Setting(
        "rebuild_fraction",
        0.20,
        _fraction,
        "The nightly `index` updates the previous generation's index in place (add and remove by id, "
        "regroup only what changed) until the files added, removed or changed since its last full build "
        "exceed this fraction of the collection; then it rebuilds: whitening refitted, index rebuilt.",
    ),
    Setting(
        "recalibrate_change",
        0.10,
        _fraction,
        "A nightly `index` with the same model reuses the previous calibration's thresholds until the "
        "files added, removed or changed since that calibration exceed this fraction of the collection.",
    ),
    Setting(
        "retrain_growth",
        0.50,
        _fraction,
        "`index --retrain auto` trains a new encoder when the collection has grown by more than this "
        "fraction since the current model was trained.",
    ),
    Setting(
        "retrain_heldout_drop",
        0.10,
        _fraction,
        "`index --retrain auto` also retrains when the held-out recall@1 on images added since training "
        "is lower than on the model's own held-out images by at least this much (and significantly).",
    ),
    Setting(
        "retrain_check_images",
        128,
        _positive_int,
        "Images on each side of that held-out comparison (at least 16 new images are needed to run it).",
    ),
    Setting(
        "keep_paths",
        "",
        _parse_list,
        "Paths or glob patterns of files `quarantine` never moves, even if a group then keeps "
        "two files (comma-separated; first rule of the keeper policy).",
    ),
    Setting(
        "prefer_folders",
        "",
        _parse_list,
        "Folder patterns in order of preference: a group's keeper is the copy under the "
        "earliest-listed one (second rule of the keeper policy).",
    ),
    Setting(
        "prefer_formats",
        "",
        _parse_list,
        "Image formats in order of preference, e.g. png,tiff: a group's keeper is the copy in "
        "the earliest-listed format (third rule of the keeper policy).",
    ),
    Setting(
        "serve_host",
        "127.0.0.1",
        str,
        "Address `nearsight serve` listens on. Any address other than loopback needs `api_key`, "
        "and then every request but /healthz and /readyz must carry it.",
    ),
    Setting(
        "serve_port",
        8080,
        _port,
        "TCP port `nearsight serve` listens on (0: any free port, printed at start).",
    ),
    Setting(
        "serve_threads",
        8,
        _positive_int,
        "Request threads of the HTTP service (one process; the index and model are loaded once).",
    ),
    Setting(
        "api_key",
        "",
        _api_key,
        "Bearer token (16+ characters) the HTTP service requires for writing (verdicts), and for "
        "everything when it listens beyond loopback. Empty: `serve` makes a one-off key per start "
        "and prints it with the review page's address.",
        secret=True,
    ),
    Setting(
        "max_upload_bytes",
        32 * 1024 * 1024,
        _positive_int,
        "Largest image the HTTP service takes in one search request, in bytes (larger: 413).",
    ),
    Setting(
        "max_upload_pixels",
        50_000_000,
        _positive_int,
        "Largest uploaded image the HTTP service decodes, in pixels from its header (larger: 422 "
        "too-large). Lower than max_pixels because a request decodes while others wait.",
    ),
    Setting(
        "rate_uploads",
        120,
        _positive_int,
        "Image uploads (POST /v1/search, /v1/check) one client may send a minute; more get 429 with "
        "Retry-After (0: no limit).",
    ),
    Setting(
        "rate_writes",
        120,
        _positive_int,
        "Writes (verdicts, keeper choices) one client may send a minute; more get 429 with Retry-After "
        "(0: no limit).",
    ),
    Setting(
        "max_decodes",
        2,
        _positive_int,
        "Uploads the HTTP service decodes at once; others wait up to decode_wait_s, then get 503. Bounds "
        "the memory many large uploads can take together.",
    ),
    Setting(
        "decode_wait_s",
        10.0,
        _positive_float,
        "How long an upload waits for its turn to be decoded before the service answers 503.",
    ),
    Setting(
        "client_timeout_s",
        30.0,
        _positive_float,
        "Seconds the HTTP service keeps a connection on which nothing arrives (a slow or stalled client) "
        "before closing it.",
    ),
    Setting(
        "allowed_hosts",
        "",
        _origins,
        "Host names the service answers for besides the loopback names (localhost, 127.0.0.1, [::1]) and the "
        "address it listens on (comma-separated, e.g. photos.example.org; * for any). A request naming any "
        "other host gets 421: a web page cannot rebind its own name to this machine and read the collection.",
    ),
    Setting(
        "cors_origins",
        "",
        _origins,
        "Web origins (comma-separated, e.g. https://catalog.example.org; * for any) whose pages may "
        "call the HTTP API from a browser. Empty: CORS off.",
    ),
    Setting(
        "serve_reload_s",
        2.0,
        _positive_float,
        "How often, in seconds, the HTTP service checks for a newly published generation to swap in.",
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
            "secret": s.secret,
        }
        for s in SETTINGS
    ]
