"""Scene recipes and plans for the archive photos.

A *recipe* fixes what kind of photo it is (composition, season, time of day,
print tone, light side, size). A *plan* fills a recipe with random content
(hills, houses, trees, boats...) as plain numbers, so a look-alike is a second
plan from the same recipe and a burst frame is the same plan with a few things
moved. `_render.render` turns a plan into pixels.
"""

from __future__ import annotations

import copy

import numpy as np

COMPOSITIONS = ("lakeside", "village", "river-bridge", "farmland", "street", "woods")
TONES = ("colour", "faded", "sepia", "black-and-white")
SEASONS = ("spring", "summer", "autumn", "winter")
TIMES = ("day", "day", "dusk", "overcast")
LONG_SIDES = (480, 512, 544, 576, 600, 640, 720, 800)
LANDSCAPE = ((4, 3), (3, 2), (5, 4), (16, 10), (1, 1))
PORTRAIT = ((3, 4), (2, 3), (4, 5))

SKY = {"day": ([0.30, 0.50, 0.84], [0.78, 0.86, 0.95]),
       "dusk": ([0.20, 0.20, 0.44], [0.98, 0.62, 0.35]),
       "overcast": ([0.56, 0.58, 0.62], [0.84, 0.84, 0.83])}
GROUND = {"spring": [0.42, 0.58, 0.26], "summer": [0.36, 0.50, 0.20],
          "autumn": [0.55, 0.46, 0.22], "winter": [0.90, 0.91, 0.94]}
LEAF = {"spring": [0.42, 0.60, 0.26], "summer": [0.18, 0.36, 0.13],
        "autumn": [0.74, 0.40, 0.12], "winter": [0.12, 0.24, 0.16]}
WALLS = ([0.62, 0.30, 0.22], [0.85, 0.80, 0.68], [0.72, 0.70, 0.64], [0.55, 0.42, 0.30], [0.90, 0.88, 0.82])
ROOFS = ([0.30, 0.22, 0.20], [0.45, 0.20, 0.16], [0.28, 0.30, 0.34], [0.38, 0.32, 0.26])
TRIMS = ([0.92, 0.90, 0.86], [0.20, 0.28, 0.22], [0.35, 0.22, 0.16], [0.18, 0.22, 0.35])
BARNS = ([0.55, 0.18, 0.14], [0.50, 0.50, 0.48], [0.85, 0.83, 0.78], [0.42, 0.30, 0.20])
STONES = ([0.62, 0.58, 0.52], [0.55, 0.45, 0.38], [0.70, 0.68, 0.62])
AWNINGS = ([0.60, 0.15, 0.12], [0.15, 0.35, 0.20], [0.20, 0.25, 0.50])
BOATS = ([0.80, 0.78, 0.72], [0.55, 0.15, 0.12], [0.15, 0.25, 0.40], [0.30, 0.45, 0.30])
MOVABLE = ("birds", "boat")


def _colour(rng: np.random.Generator, base, spread: float = 0.04) -> list[float]:
    return [round(float(c), 4) for c in np.clip(np.asarray(base) + rng.normal(0, spread, 3), 0, 1)]


def _pick(rng: np.random.Generator, options):
    return options[int(rng.integers(len(options)))]


def _u(rng: np.random.Generator, lo: float, hi: float) -> float:
    return round(float(rng.uniform(lo, hi)), 4)


def make_recipe(rng: np.random.Generator, composition: str, tone: str, season: str) -> dict:
    """Choose time of day, light side and size for one photo of a given composition, tone and season."""
    portrait_odds = 0.5 if composition in ("street", "woods") else 0.15
    ratio = _pick(rng, PORTRAIT if rng.random() < portrait_odds else LANDSCAPE)
    long_side = int(_pick(rng, LONG_SIDES))
    if ratio[0] >= ratio[1]:
        w, h = long_side, long_side * ratio[1] // ratio[0]
    else:
        w, h = long_side * ratio[0] // ratio[1], long_side
    return {"composition": composition, "tone": tone, "season": season, "time": _pick(rng, TIMES),
            "light": int(_pick(rng, (-1, 1))), "size": [int(w), int(h)]}


def plan_scene(rng: np.random.Generator, recipe: dict) -> dict:
    """Fill a recipe with random content; the result is plain data that `render` draws."""
    season, time = recipe["season"], recipe["time"]
    top, bottom = SKY[time]
    plan = {"recipe": recipe, "noise_seed": int(rng.integers(2**62)),
            "sky": {"top": _colour(rng, top), "bottom": _colour(rng, bottom),
                    "clouds": _u(rng, 0.15, 0.7) if time != "overcast" else _u(rng, 0.6, 0.95),
                    "cloud_scale": _u(rng, 0.2, 0.5)},
            "sun": None, "hills": [], "water": None, "back": [], "front": []}
    PLANNERS[recipe["composition"]](rng, plan)
    if time != "overcast" and rng.random() < 0.6:
        hz = plan["horizon"]
        plan["sun"] = {"x": round(0.5 + recipe["light"] * _u(rng, 0.12, 0.38), 4),
                       "y": round(hz - _u(rng, 0.08, 0.6) * hz * (0.5 if time == "dusk" else 1.0), 4),
                       "r": _u(rng, 0.025, 0.06), "moon": bool(time == "dusk" and rng.random() < 0.5)}
    if rng.random() < 0.75:
        plan["front"].append(_birds(rng, plan["horizon"]))
    return plan


def burst_of(plan: dict, rng: np.random.Generator) -> tuple[dict, tuple[int, int], dict]:
    """The same scene a moment later: birds and boats moved a little, the camera shifted a few pixels.

    Returns (plan, camera shift in pixels (dx, dy), params for the truth file).
    """
    moved = copy.deepcopy(plan)
    count = 0
    for item in moved["front"] + moved["back"]:
        if item["type"] == "birds":
            dx, dy = _u(rng, 0.01, 0.04) * _pick(rng, (-1, 1)), _u(rng, -0.015, 0.015)
            item["flock"] = [[round(x + dx, 4), round(y + dy, 4), s] for x, y, s in item["flock"]]
            count += len(item["flock"])
        elif item["type"] == "boat":
            item["x"] = round(item["x"] + _u(rng, 0.008, 0.025) * _pick(rng, (-1, 1)), 4)
            count += 1
    margin = render_margin(plan["recipe"]["size"])
    camera = (int(rng.integers(-margin // 2, margin // 2 + 1)), int(rng.integers(-margin // 2, margin // 2 + 1)))
    if camera == (0, 0):
        camera = (max(margin // 3, 1), 0)
    return moved, camera, {"camera_shift": list(camera), "objects_moved": count}


def render_margin(size) -> int:
    """Extra border rendered around every photo so a burst frame can shift the camera."""
    return max(int(max(size) * 0.02), 4)


# --- content helpers -------------------------------------------------------------

def _hills(rng, plan, count: int, height: float) -> None:
    hz, ground = plan["horizon"], GROUND[plan["recipe"]["season"]]
    far = np.asarray(plan["sky"]["bottom"]) * 0.7 + np.asarray([0.2, 0.3, 0.3]) * 0.3
    for k in range(count):
        t = (k + 1) / count
        colour = far * (1 - t) + np.asarray(ground) * 0.8 * t
        plan["hills"].append({"base": round(hz + 0.01 * k, 4),
                              "amp": round(height * (1 - 0.35 * k) * _u(rng, 0.6, 1.4), 4),
                              "scale": _u(rng, 0.15, 0.6), "colour": _colour(rng, colour, 0.03),
                              "haze": round(0.5 * (1 - t), 4)})


def _house(rng, x: float, y: float, scale: float, barn: bool = False) -> dict:
    w = scale * _u(rng, 0.8, 1.3) * (1.5 if barn else 1)
    return {"type": "house", "x": round(x, 4), "y": round(y, 4), "w": round(w, 4),
            "h": round(w * _u(rng, 0.55, 0.9), 4),
            "roof": _u(rng, 0.35, 0.7), "depth": _u(rng, 0.2, 0.5), "side": int(_pick(rng, (-1, 1))),
            "wall": _colour(rng, _pick(rng, BARNS) if barn else _pick(rng, WALLS)),
            "roof_colour": _colour(rng, _pick(rng, ROOFS)), "trim": _colour(rng, _pick(rng, TRIMS), 0.02),
            "texture": "boards" if barn else _pick(rng, ("brick", "boards", "plaster")),
            "rows": 1 if barn else int(rng.integers(1, 3)), "cols": int(rng.integers(2, 4)),
            "door": bool(rng.random() < 0.7), "chimney": bool(not barn and rng.random() < 0.6)}


def _tree(rng, x: float, y: float, h: float, season: str) -> dict:
    kind = "conifer" if rng.random() < 0.3 else ("bare" if season == "winter" else "broad")
    item = {"type": "tree", "kind": kind, "x": round(x, 4), "y": round(y, 4), "h": round(h, 4),
            "spread": _u(rng, 0.35, 0.5) if kind == "conifer" else _u(rng, 0.6, 0.95),
            "trunk": _colour(rng, [0.25, 0.18, 0.12]),
            "leaf": _colour(rng, LEAF["winter" if kind == "conifer" else season])}
    if kind == "broad":
        blobs = [[0.0, 0.0, 0.62]]
        for _ in range(int(rng.integers(4, 9))):
            r = _u(rng, 0.3, 0.5)
            angle = rng.uniform(0, 2 * np.pi)
            dist = rng.uniform(0.1, 1 - r)
            blobs.append([round(float(np.cos(angle) * dist), 4), round(float(np.sin(angle) * dist), 4), r])
        item["blobs"] = blobs
        item["blossom"] = bool(season == "spring" and rng.random() < 0.4)
    elif kind == "bare":
        item["branches"] = _branches(rng, 0.0, 0.0, 0.0, 0.45, 0.05, 3)
    return item


def _branches(rng, x, y, angle, length, width, depth) -> list[list[float]]:
    """Recursive branch segments (x0, y0, x1, y1, width) in tree units: x across in half-widths, y up in heights."""
    x1, y1 = x + np.sin(angle) * length * 1.6, y + np.cos(angle) * length
    segs = [[round(float(v), 4) for v in (x, y, x1, y1, width)]]
    if depth:
        for side in (-1, 1):
            segs += _branches(rng, x1, y1, angle + side * rng.uniform(0.3, 0.7), length * rng.uniform(0.55, 0.75),
                              width * 0.6, depth - 1)
    return segs


def _birds(rng, horizon: float) -> dict:
    n = int(rng.integers(2, 8))
    cx, cy = rng.uniform(0.1, 0.8), rng.uniform(0.05, max(horizon * 0.7, 0.1))
    flock = [[round(float(cx + rng.normal(0, 0.06)), 4), round(float(cy + rng.normal(0, 0.03)), 4),
              _u(rng, 0.008, 0.02)] for _ in range(n)]
    return {"type": "birds", "flock": flock}


def _row_of_trees(rng, plan, n: int, y_lo: float, y_hi: float, size: float, layer: str = "back") -> None:
    for _ in range(n):
        y = rng.uniform(y_lo, y_hi)
        depth = (y - plan["horizon"]) / max(1 - plan["horizon"], 0.1)
        plan[layer].append(_tree(rng, rng.uniform(-0.05, 1.05), y, size * (0.5 + 1.5 * depth) * rng.uniform(0.7, 1.3),
                                 plan["recipe"]["season"]))


def _fence(rng, y: float) -> dict:
    y1 = y + rng.uniform(-0.12, 0.06)
    x0, x1 = rng.uniform(-0.1, 0.3), rng.uniform(0.7, 1.1)
    if rng.random() < 0.5:
        x0, x1 = 1 - x0, 1 - x1
    return {"type": "fence", "x0": round(x0, 4), "x1": round(x1, 4), "y0": round(y, 4), "y1": round(y1, 4),
            "h0": _u(rng, 0.08, 0.16), "h1": _u(rng, 0.05, 0.1), "posts": int(rng.integers(6, 14)),
            "colour": _colour(rng, [0.42, 0.32, 0.22])}


def _boat(rng, x, y, w, sails: bool) -> dict:
    """A boat on the water; x, y and w are (low, high) ranges; with `sails` about half get a sail."""
    return {"type": "boat", "x": _u(rng, *x), "y": _u(rng, *y), "w": _u(rng, *w),
            "sail": bool(sails and rng.random() < 0.5), "colour": _colour(rng, _pick(rng, BOATS)),
            "sail_colour": _colour(rng, [0.9, 0.88, 0.8])}


def _path(rng, top: float, x_far, x_near, w_far, w_near, colour) -> dict:
    """A track from the horizon to the foot of the frame; each x/w argument is a (low, high) range."""
    return {"type": "path", "top": round(top, 4), "x_far": _u(rng, *x_far), "x_near": _u(rng, *x_near),
            "w_far": _u(rng, *w_far), "w_near": _u(rng, *w_near), "colour": _colour(rng, colour),
            "y": 0.0}  # drawn first among the back layer


def _sort(plan) -> None:
    for layer in ("back", "front"):
        plan[layer].sort(key=lambda item: item.get("y", 0.0))


# --- one planner per composition ------------------------------------------------

def _plan_lakeside(rng, plan) -> None:
    hz = plan["horizon"] = _u(rng, 0.32, 0.5)
    _hills(rng, plan, int(rng.integers(1, 3)), 0.12)
    shore = round(hz + _u(rng, 0.03, 0.08), 4)
    plan["ground"] = {"kind": "grass", "colour": _colour(rng, GROUND[plan["recipe"]["season"]])}
    plan["water"] = {"top": shore, "bottom": 1.0, "colour": _colour(rng, [0.22, 0.32, 0.40]),
                     "ripple": _u(rng, 0.5, 1.5)}
    for _ in range(int(rng.integers(0, 4))):
        plan["back"].append(_house(rng, rng.uniform(0.05, 0.95), shore, 0.06))
    _row_of_trees(rng, plan, int(rng.integers(3, 9)), shore - 0.005, shore + 0.001, 0.07)
    for _ in range(int(rng.integers(1, 4))):
        plan["front"].append(_boat(rng, (0.1, 0.9), (shore + 0.1, 0.92), (0.1, 0.22), sails=True))
    _sort(plan)


def _plan_village(rng, plan) -> None:
    hz = plan["horizon"] = _u(rng, 0.38, 0.55)
    _hills(rng, plan, int(rng.integers(2, 4)), 0.14)
    plan["ground"] = {"kind": "grass", "colour": _colour(rng, GROUND[plan["recipe"]["season"]])}
    for _ in range(int(rng.integers(2, 6))):
        y = rng.uniform(hz + 0.06, hz + 0.3)
        plan["back"].append(_house(rng, rng.uniform(0.05, 0.95), y, 0.12 + 0.6 * (y - hz)))
    _row_of_trees(rng, plan, int(rng.integers(3, 9)), hz + 0.02, hz + 0.3, 0.12)
    if rng.random() < 0.8:
        plan["front"].append(_fence(rng, rng.uniform(0.8, 0.97)))
    _sort(plan)


def _plan_river_bridge(rng, plan) -> None:
    hz = plan["horizon"] = _u(rng, 0.3, 0.45)
    _hills(rng, plan, int(rng.integers(1, 3)), 0.1)
    plan["ground"] = {"kind": "grass", "colour": _colour(rng, GROUND[plan["recipe"]["season"]])}
    deck = round(hz + _u(rng, 0.04, 0.12), 4)
    water = round(deck + _u(rng, 0.08, 0.16), 4)
    plan["water"] = {"top": water, "bottom": _u(rng, 0.8, 1.0), "colour": _colour(rng, [0.20, 0.28, 0.30]),
                     "ripple": _u(rng, 0.3, 1.0)}
    _row_of_trees(rng, plan, int(rng.integers(4, 10)), hz + 0.005, deck, 0.12)
    x0, x1 = _u(rng, -0.25, 0.0), _u(rng, 1.0, 1.25)
    plan["back"].append({"type": "bridge", "x0": x0, "x1": x1, "deck": deck, "water": water,
                         "y": round(deck + 0.001, 4),  # drawn after the far-bank trees
                         "arches": int(rng.integers(2, 5)), "arch_height": _u(rng, 0.6, 0.85),
                         "colour": _colour(rng, _pick(rng, STONES))})
    if plan["water"]["bottom"] < 0.95:
        _row_of_trees(rng, plan, int(rng.integers(1, 3)), plan["water"]["bottom"] + 0.02, 1.0, 0.2, layer="front")
    if rng.random() < 0.4:
        near = (water + 0.08, plan["water"]["bottom"])
        plan["front"].append(_boat(rng, (0.15, 0.85), near, (0.1, 0.18), sails=False))
    _sort(plan)


def _plan_farmland(rng, plan) -> None:
    hz = plan["horizon"] = _u(rng, 0.4, 0.62)
    _hills(rng, plan, int(rng.integers(1, 3)), 0.07)
    season = plan["recipe"]["season"]
    plan["ground"] = {"kind": "snow" if season == "winter" else "field", "colour": _colour(rng, GROUND[season]),
                      "crop": _colour(rng, _pick(rng, ([0.62, 0.52, 0.30], [0.45, 0.36, 0.24], [0.5, 0.6, 0.3]))),
                      "vanish": _u(rng, -0.3, 1.3)}
    barn = _house(rng, rng.uniform(0.1, 0.9), hz + rng.uniform(0.03, 0.12), 0.16, barn=True)
    plan["back"].append(barn)
    if rng.random() < 0.5:
        x = (barn["x"] + rng.uniform(0.2, 0.4) * _pick(rng, (-1, 1))) % 1.0
        plan["back"].append(_house(rng, x, barn["y"] + rng.uniform(-0.02, 0.03), 0.1))
    if rng.random() < 0.6:
        hedge_y = hz + rng.uniform(0.01, 0.06)
        for x in np.sort(rng.uniform(-0.05, 1.05, int(rng.integers(6, 14)))):
            plan["back"].append(_tree(rng, float(x), hedge_y + rng.normal(0, 0.004), rng.uniform(0.04, 0.08), season))
    else:
        _row_of_trees(rng, plan, int(rng.integers(1, 5)), hz + 0.005, hz + 0.15, 0.1)
    if season in ("summer", "autumn"):
        for _ in range(int(rng.integers(0, 6))):
            y = rng.uniform(hz + 0.08, 0.9)
            plan["front"].append({"type": "stack", "x": _u(rng, 0.05, 0.95), "y": round(y, 4),
                                  "w": round(0.04 + 0.2 * (y - hz), 4), "colour": _colour(rng, [0.78, 0.66, 0.38])})
    if rng.random() < 0.5:
        plan["back"].append(_path(rng, hz + 0.02, (0.3, 0.7), (0.2, 0.8), (0.005, 0.02), (0.15, 0.3),
                                  [0.55, 0.45, 0.32]))
    if rng.random() < 0.7:
        plan["front"].append(_fence(rng, rng.uniform(0.75, 0.95)))
    _sort(plan)


def _plan_street(rng, plan) -> None:
    hz = plan["horizon"] = _u(rng, 0.62, 0.78)
    plan["ground"] = {"kind": "cobbles", "colour": _colour(rng, [0.5, 0.48, 0.45]), "vanish": _u(rng, 0.3, 0.7)}
    edges = np.sort(rng.uniform(0.0, 1.0, int(rng.integers(2, 5))))
    edges = np.concatenate([[-0.02], edges[(edges > 0.12) & (edges < 0.88)], [1.02]])
    for x0, x1 in zip(edges[:-1], edges[1:]):
        plan["back"].append({"type": "facade", "x0": round(float(x0), 4), "x1": round(float(x1), 4),
                             "top": _u(rng, 0.06, 0.35), "y": hz, "gable": bool(rng.random() < 0.35),
                             "wall": _colour(rng, _pick(rng, WALLS)), "trim": _colour(rng, _pick(rng, TRIMS), 0.02),
                             "texture": _pick(rng, ("brick", "brick", "plaster", "boards")),
                             "rows": int(rng.integers(2, 5)), "cols": int(rng.integers(2, 5)),
                             "shop": bool(rng.random() < 0.6), "awning": _colour(rng, _pick(rng, AWNINGS)),
                             "stripes": int(rng.integers(5, 11))})
    for _ in range(int(rng.integers(1, 3))):
        plan["front"].append({"type": "lamp", "x": _u(rng, 0.05, 0.95), "y": _u(rng, hz + 0.05, 0.98),
                              "h": _u(rng, 0.3, 0.5)})
    _sort(plan)


def _plan_woods(rng, plan) -> None:
    hz = plan["horizon"] = _u(rng, 0.42, 0.6)
    _hills(rng, plan, 1, 0.08)
    season = plan["recipe"]["season"]
    plan["ground"] = {"kind": "snow" if season == "winter" else "grass", "colour": _colour(rng, GROUND[season])}
    plan["back"].append(_path(rng, hz + 0.01, (0.35, 0.65), (0.3, 0.7), (0.01, 0.03), (0.3, 0.5), [0.5, 0.42, 0.3]))
    _row_of_trees(rng, plan, int(rng.integers(10, 18)), hz, hz + 0.06, 0.2)
    _row_of_trees(rng, plan, int(rng.integers(4, 9)), hz + 0.06, hz + 0.25, 0.2)
    _row_of_trees(rng, plan, int(rng.integers(1, 4)), 0.85, 1.0, 0.35, layer="front")
    _sort(plan)


PLANNERS = {"lakeside": _plan_lakeside, "village": _plan_village, "river-bridge": _plan_river_bridge,
            "farmland": _plan_farmland, "street": _plan_street, "woods": _plan_woods}
