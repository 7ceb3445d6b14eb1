"""Objects painted into the archive scenes: houses, shop fronts, trees, fences, boats, a bridge, birds.

Each `draw_*` takes the canvas, one plan item (a dict of plain numbers, positions
as fractions of the canvas, sizes as fractions of its short side `u`) and the
render context (light direction and the noise generator). Objects are built as a
small RGB patch with an alpha mask and composited, so cost scales with their size.
"""

from __future__ import annotations

import numpy as np

from ._paint import blend, bricks, rgb, shape_mask, smooth_noise, wood_grain

GLASS = rgb([0.12, 0.13, 0.15])
LIT_GLASS = rgb([0.95, 0.78, 0.45])
MORTAR = rgb([0.78, 0.75, 0.68])


class Patch:
    """A local RGB (3, h, w) + alpha (h, w) layer that shapes are painted onto before it is composited."""

    def __init__(self, h: int, w: int):
        self.h, self.w = h, w
        self.rgb = np.zeros((3, h, w), np.float32)
        self.alpha = np.zeros((h, w), np.float32)

    def paint(self, shapes, colour) -> None:
        """Draw shapes in `colour` (a colour or a patch-sized (3, h, w) surface), touching only their bounding box."""
        xs = [c for _, xy, _ in shapes for c in xy[0::2]]
        ys = [c for _, xy, _ in shapes for c in xy[1::2]]
        pad = max(o.get("width", 0) for _, _, o in shapes) + 2
        x0, y0 = max(int(min(xs) - pad), 0), max(int(min(ys) - pad), 0)
        x1, y1 = min(int(max(xs) + pad) + 1, self.w), min(int(max(ys) + pad) + 1, self.h)
        if x0 >= x1 or y0 >= y1:
            return
        moved = [(m, [c - (x0 if k % 2 == 0 else y0) for k, c in enumerate(xy)], o) for m, xy, o in shapes]
        mask = shape_mask(y1 - y0, x1 - x0, moved)
        colour = np.asarray(colour, np.float32)
        if colour.ndim == 3 and colour.shape[-2:] != (1, 1):
            colour = colour[:, y0:y1, x0:x1]
        blend(self.rgb[:, y0:y1, x0:x1], mask, colour)
        np.maximum(self.alpha[y0:y1, x0:x1], mask, out=self.alpha[y0:y1, x0:x1])

    def flip(self) -> None:
        self.rgb = self.rgb[:, :, ::-1].copy()
        self.alpha = self.alpha[:, ::-1].copy()

    def onto(self, img: np.ndarray, top: int, left: int, shade: float = 1.0) -> None:
        blend(img, self.alpha, self.rgb * shade, top, left)


def wall_texture(ctx, h: int, w: int, colour, texture: str, unit: float) -> np.ndarray:
    """A (3, h, w) wall surface: running-bond brick, wooden boards or stained plaster."""
    base = rgb(colour)
    if texture == "brick":
        y = np.arange(h, dtype=np.float32)[:, None] / max(unit * 0.5, 1.5)
        x = np.arange(w, dtype=np.float32)[None, :] / max(unit * 1.3, 3.0)
        mortar, jitter = bricks(x, y, salt=ctx["salt"])
        surface = base * (0.8 + 0.35 * jitter)
        return surface * (1 - mortar) + MORTAR * mortar
    if texture == "boards":
        board = max(unit * 0.7, 2.0)
        y = np.arange(h, dtype=np.float32)[:, None]
        seam = ((y % board) < 1.0).astype(np.float32) * 0.35
        grain = wood_grain(ctx["nrng"], h, w, board / 3)
        return base * (grain * (1 - seam))
    stain = smooth_noise(ctx["nrng"], h, w, max(h, w) / 2, octaves=3)
    return base * (1 + 0.06 * stain)


def paint_windows(patch: Patch, box, rows: int, cols: int, trim, lit: bool, door: bool) -> None:
    """A grid of framed, four-pane windows inside box = (x0, y0, x1, y1); optionally a door at the bottom centre."""
    x0, y0, x1, y1 = box
    cw, ch = (x1 - x0) / cols, (y1 - y0) / rows
    frames, panes, bars = [], [], []
    for r in range(rows):
        for c in range(cols):
            if door and r == rows - 1 and c == cols // 2:
                dx0, dx1 = x0 + c * cw + cw * 0.22, x0 + (c + 1) * cw - cw * 0.22
                patch.paint([("rectangle", (dx0, y0 + r * ch + ch * 0.2, dx1, y1), {})], rgb(trim) * 0.45)
                continue
            wx0, wy0 = x0 + c * cw + cw * 0.25, y0 + r * ch + ch * 0.22
            wx1, wy1 = x0 + (c + 1) * cw - cw * 0.25, y0 + (r + 1) * ch - ch * 0.25
            f = max((wx1 - wx0) * 0.12, 0.6)
            mx, my = (wx0 + wx1) / 2, (wy0 + wy1) / 2
            frames.append(("rectangle", (wx0 - f, wy0 - f, wx1 + f, wy1 + f * 2), {}))
            panes.append(("rectangle", (wx0, wy0, wx1, wy1), {}))
            bars += [("line", (mx, wy0, mx, wy1), {"width": f * 0.7}), ("line", (wx0, my, wx1, my), {"width": f * 0.7})]
    if frames:
        patch.paint(frames, trim)
        patch.paint(panes, LIT_GLASS if lit else GLASS)
        patch.paint(bars, trim)


def draw_house(img, item, ctx) -> None:
    """A gabled house seen front-on with one receding side wall, a roof plane, windows, door, chimney."""
    H, W = img.shape[-2:]
    u = min(H, W)
    bw, bh = max(int(item["w"] * u), 8), max(int(item["h"] * u), 8)
    rh, sd, ov = int(bh * item["roof"]), int(bw * item["depth"]), max(bw // 12, 1)
    p = Patch(bh + rh + 3, bw + sd + 2 * ov + 1)
    L, R, B = ov, ov + bw, p.h - 1
    T, A = B - bh, B - bh - rh
    mid = (L + R) / 2
    side_lit = item["side"] * ctx["light"] > 0
    wall = wall_texture(ctx, p.h, p.w, item["wall"], item["texture"], bh / 12)
    p.paint([("polygon", (R, T, R + sd, T - rh * 0.25, R + sd, B - sd * 0.15, R, B), {})],
            wall * (0.95 if side_lit else 0.6))
    p.paint([("polygon", (L, B, R, B, R, T, mid, A, L, T), {})], wall * (0.88 if side_lit else 1.0))
    roof = rgb(item["roof_colour"])
    p.paint([("polygon", (mid, A, mid + sd, A - rh * 0.25, R + sd + ov, T - rh * 0.2 + ov, R + ov, T + ov), {})],
            roof * (1.0 if side_lit else 0.75))
    if item["chimney"]:
        cx = mid + sd * 0.55 + bw * 0.12
        p.paint([("rectangle", (cx, A - rh * 0.15, cx + bw * 0.08, A + rh * 0.45), {})], rgb(item["wall"]) * 0.7)
    p.paint([("line", (L - ov, T + ov, mid, A, R + ov, T + ov), {"width": max(ov * 0.8, 1)})], roof * 0.6)
    paint_windows(p, (L + bw * 0.06, T + bh * 0.08, R - bw * 0.06, B), item["rows"], item["cols"],
                  item["trim"], ctx["lit_windows"], item["door"])
    if item["side"] < 0:
        p.flip()
        left = int(item["x"] * W - (p.w - mid))
    else:
        left = int(item["x"] * W - mid)
    p.onto(img, int(item["y"] * H) - B, left)


def draw_facade(img, item, ctx) -> None:
    """A terraced town building filling a slice of the frame: wall, cornice or gable, windows, shop front."""
    H, W = img.shape[-2:]
    x0, x1 = int(item["x0"] * W), int(item["x1"] * W)
    top, base = int(item["top"] * H), int(item["y"] * H)
    gable = int((x1 - x0) * 0.3) if item["gable"] else 0
    p = Patch(base - top + gable + 1, x1 - x0 + 1)
    T = gable
    wall = wall_texture(ctx, p.h, p.w, item["wall"], item["texture"], (base - top) / 30)
    shape = (0, p.h, p.w, p.h, p.w, T, p.w / 2, 0, 0, T) if gable else (0, 0, p.w, 0, p.w, p.h, 0, p.h)
    p.paint([("polygon", shape, {})], wall)
    p.paint([("rectangle", (0, T, p.w, T + max(p.h * 0.02, 2)), {})], rgb(item["trim"]) * 0.8)
    shop = p.h * 0.28 if item["shop"] else 0
    paint_windows(p, (p.w * 0.05, T + p.h * 0.06, p.w * 0.95, p.h - shop - p.h * 0.02),
                  item["rows"], item["cols"], item["trim"], ctx["lit_windows"], door=not shop)
    if shop:
        y0 = p.h - shop
        p.paint([("rectangle", (p.w * 0.08, y0 + shop * 0.3, p.w * 0.62, p.h), {})], GLASS)
        p.paint([("rectangle", (p.w * 0.7, y0 + shop * 0.25, p.w * 0.9, p.h), {})], rgb(item["trim"]) * 0.4)
        stripes = int(item["stripes"])
        for s in range(stripes):
            colour = item["awning"] if s % 2 == 0 else [0.92, 0.9, 0.85]
            sx0 = p.w * 0.04 + s * p.w * 0.64 / stripes
            p.paint([("polygon", (sx0, y0, sx0 + p.w * 0.64 / stripes, y0,
                                  sx0 + p.w * 0.68 / stripes, y0 + shop * 0.3, sx0, y0 + shop * 0.3), {})], colour)
    shade = 1.0 - 0.12 * abs(item["x0"] + item["x1"] - 1 - ctx["light"] * 0.5)
    p.onto(img, top - gable, x0, shade)


def draw_tree(img, item, ctx) -> None:
    """A broadleaf (blobby crown), conifer (stacked tiers) or bare winter tree (branch lines)."""
    H, W = img.shape[-2:]
    u = min(H, W)
    th, cw = max(int(item["h"] * u), 8), max(int(item["h"] * u * item["spread"]), 6)
    p = Patch(th + 2, cw + 2)
    cx, base = p.w / 2, p.h - 1
    trunk = rgb(item["trunk"])
    if item["kind"] == "bare":
        segs = [("line", (cx + x0 * cw / 2, base - y0 * th, cx + x1 * cw / 2, base - y1 * th),
                 {"width": max(wd * th, 0.6)}) for x0, y0, x1, y1, wd in item["branches"]]
        p.paint(segs, trunk)
    else:
        tw = max(th * 0.05, 1.5)
        top = base - th * 0.55
        p.paint([("polygon", (cx - tw, base, cx + tw, base, cx + tw * 0.5, top, cx - tw * 0.5, top), {})], trunk)
        if item["kind"] == "conifer":
            tiers = 4
            shapes = [("polygon", (cx - cw / 2 * (1 - k * 0.2), base - th * (0.12 + k * 0.2),
                                   cx + cw / 2 * (1 - k * 0.2), base - th * (0.12 + k * 0.2),
                                   cx, base - th * (0.42 + k * 0.19)), {}) for k in range(tiers)]
        else:
            r0 = cw / 2
            ccy = base - th + r0
            shapes = [("ellipse", (cx + (dx - r) * r0, ccy + (dy - r) * r0, cx + (dx + r) * r0, ccy + (dy + r) * r0),
                       {}) for dx, dy, r in item["blobs"]]
        mask = shape_mask(p.h, p.w, shapes)
        foliage = _foliage(ctx, p.h, p.w, item)
        blend(p.rgb, mask, foliage)
        np.maximum(p.alpha, mask, out=p.alpha)
    p.onto(img, int(item["y"] * H) - base, int(item["x"] * W - cx))


def _foliage(ctx, h: int, w: int, item) -> np.ndarray:
    """Leaf texture lit from the light side and from above, with optional blossom specks."""
    x = np.linspace(-1, 1, w, dtype=np.float32)[None, :]
    y = np.linspace(-1, 1, h, dtype=np.float32)[:, None]
    light = 0.8 + 0.25 * x * ctx["light"] - 0.15 * y
    clumps = smooth_noise(ctx["nrng"], h, w, max(w / 5, 3), octaves=3)
    colour = rgb(item["leaf"]) * (light + 0.14 * clumps)
    if item.get("blossom"):
        specks = clumps > 1.7
        colour = np.where(specks, rgb([0.95, 0.8, 0.85]), colour)
    return colour.astype(np.float32)


def draw_fence(img, item, ctx) -> None:
    """Wooden posts and two rails along a line, shrinking with distance from one end to the other."""
    H, W = img.shape[-2:]
    u = min(H, W)
    x0, x1 = item["x0"] * W, item["x1"] * W
    y0, y1 = item["y0"] * H, item["y1"] * H
    h0, h1 = item["h0"] * u, item["h1"] * u
    top = int(min(y0 - h0, y1 - h1)) - 2
    left = int(min(x0, x1)) - 2
    p = Patch(int(max(y0, y1)) - top + 3, int(abs(x1 - x0)) + 5)
    n = max(int(item["posts"]), 2)
    t = np.linspace(0, 1, n)
    xs, ys, hs = x0 + (x1 - x0) * t - left, y0 + (y1 - y0) * t - top, h0 + (h1 - h0) * t
    posts = [("line", (x, y, x, y - h), {"width": max(h * 0.08, 1)}) for x, y, h in zip(xs, ys, hs)]
    rails = [("line", (xs[0], ys[0] - hs[0] * f, xs[-1], ys[-1] - hs[-1] * f), {"width": max(min(h0, h1) * 0.06, 1)})
             for f in (0.35, 0.8)]
    p.paint(posts + rails, rgb(item["colour"]))
    p.onto(img, top, left)


def draw_boat(img, item, ctx) -> None:
    """A rowing or sailing boat on the water, with a dim mirrored reflection below the hull."""
    H, W = img.shape[-2:]
    u = min(H, W)
    bw = max(int(item["w"] * u), 10)
    mast = int(bw * 1.1) if item["sail"] else 0
    hull_h = max(bw * 0.22, 3)
    p = Patch(int(mast + hull_h) + 3, bw + 2)
    base = p.h - 1
    hull = rgb(item["colour"])
    p.paint([("polygon", (0, base - hull_h, bw, base - hull_h, bw * 0.86, base, bw * 0.12, base), {})], hull)
    p.paint([("line", (1, base - hull_h, bw - 1, base - hull_h), {"width": max(hull_h * 0.18, 1)})], hull * 0.5 + 0.4)
    if mast:
        mx = bw * 0.45
        p.paint([("polygon", (mx + 1, base - hull_h - 2, mx + 1, base - mast, mx + bw * 0.45, base - hull_h - 2), {})],
                rgb(item["sail_colour"]))
        p.paint([("line", (mx, base - hull_h, mx, base - mast), {"width": max(bw * 0.02, 1)})], hull * 0.4)
    top, left = int(item["y"] * H) - base, int(item["x"] * W - bw / 2)
    blend(img, p.alpha[::-1] * 0.35, p.rgb[:, ::-1] * 0.55, top + p.h, left)
    p.onto(img, top, left)


def draw_bridge(img, item, ctx) -> None:
    """A stone bridge with round arches standing in the water, so the reflection closes the arches."""
    H, W = img.shape[-2:]
    x0, x1 = int(item["x0"] * W), int(item["x1"] * W)
    deck, water = int(item["deck"] * H), int(item["water"] * H)
    p = Patch(water - deck + int(H * 0.03) + 1, x1 - x0)
    top = int(H * 0.03)
    p.paint([("rectangle", (0, top, p.w, p.h), {})], rgb(item["colour"]))
    stone_u = np.arange(p.w, dtype=np.float32)[None, :] / max(p.h * 0.12, 3)
    stone_v = np.arange(p.h, dtype=np.float32)[:, None] / max(p.h * 0.07, 2)
    mortar, jitter = bricks(stone_u, stone_v, mortar=0.06, salt=ctx["salt"] + 1)
    texture = rgb(item["colour"]) * ((0.8 + 0.3 * jitter) * (1 - 0.3 * mortar))
    p.rgb = np.where(p.alpha > 0, texture, p.rgb)
    parapet = top + max(int(p.h * 0.08), 2)
    p.paint([("rectangle", (0, 0, p.w, parapet), {})], rgb(item["colour"]) * 1.08)
    span = p.w / item["arches"]
    arch_h = (p.h - parapet) * item["arch_height"]
    holes = [("ellipse", (k * span + span * 0.12, p.h - arch_h, (k + 1) * span - span * 0.12, p.h + arch_h), {})
             for k in range(int(item["arches"]))]
    # The arch openings show the shaded river under the deck; the water pass mirrors them below.
    blend(p.rgb, shape_mask(p.h, p.w, holes), rgb(item["colour"]) * 0.22)
    p.onto(img, deck - top, x0)


def draw_lamp(img, item, ctx) -> None:
    """A cast-iron street lamp: thin post, lantern box, small cap."""
    H, W = img.shape[-2:]
    u = min(H, W)
    h = max(int(item["h"] * u), 12)
    p = Patch(h + 2, max(int(h * 0.16), 5))
    cx, iron = p.w / 2, rgb([0.08, 0.08, 0.09])
    p.paint([("line", (cx, p.h - 1, cx, h * 0.18), {"width": max(h * 0.02, 1)}),
             ("polygon", (cx - p.w * 0.35, h * 0.06, cx + p.w * 0.35, h * 0.06, cx, 0), {})], iron)
    p.paint([("rectangle", (cx - p.w * 0.25, h * 0.06, cx + p.w * 0.25, h * 0.18), {})],
            LIT_GLASS if ctx["lit_windows"] else rgb([0.6, 0.62, 0.6]))
    p.onto(img, int(item["y"] * H) - p.h + 1, int(item["x"] * W - cx))


def draw_birds(img, item, ctx) -> None:
    """A small flock of distant birds drawn as shallow 'v' strokes."""
    H, W = img.shape[-2:]
    u = min(H, W)
    for x, y, s in item["flock"]:
        size = max(s * u, 3)
        p = Patch(int(size * 0.7) + 3, int(size * 2) + 3)
        p.paint([("line", (1, 1, size, size * 0.55, size * 2, 1), {"width": max(size * 0.12, 0.8), "joint": "curve"})],
                rgb([0.1, 0.1, 0.1]))
        p.onto(img, int(y * H), int(x * W))


def draw_stack(img, item, ctx) -> None:
    """A domed haystack with straw streaks and a shaded side away from the light."""
    H, W = img.shape[-2:]
    u = min(H, W)
    w = max(int(item["w"] * u), 6)
    p = Patch(int(w * 0.8) + 2, w + 2)
    x = np.linspace(-1, 1, p.w, dtype=np.float32)[None, :]
    streaks = smooth_noise(ctx["nrng"], p.h, p.w, max(w / 6, 2), octaves=2, stretch=0.3)
    straw = rgb(item["colour"]) * (0.85 + 0.2 * x * ctx["light"] + 0.08 * streaks)
    p.paint([("chord", (0, 0, p.w - 1, p.h * 1.5), {"start": 180, "end": 360}),
             ("rectangle", (0, p.h * 0.7, p.w - 1, p.h - 1), {})], straw)
    p.onto(img, int(item["y"] * H) - p.h + 1, int(item["x"] * W - p.w / 2))


def draw_path(img, item, ctx) -> None:
    """A dirt track narrowing towards the horizon, lighter in the middle where it is worn."""
    H, W = img.shape[-2:]
    top, base = int(item["top"] * H), H
    p = Patch(base - top, W)
    cx0, cx1 = item["x_far"] * W, item["x_near"] * W
    w0, w1 = item["w_far"] * W, item["w_near"] * W
    mask_shapes = [("polygon", (cx0 - w0 / 2, 0, cx0 + w0 / 2, 0, cx1 + w1 / 2, p.h, cx1 - w1 / 2, p.h), {})]
    ruts = smooth_noise(ctx["nrng"], p.h, p.w, max(p.w / 8, 4), octaves=3)
    colour = rgb(item["colour"]) * (1 + 0.08 * ruts)
    mask = shape_mask(p.h, p.w, mask_shapes)
    blend(img, mask * 0.9, colour, top, 0)


DRAW = {
    "house": draw_house,
    "facade": draw_facade,
    "tree": draw_tree,
    "fence": draw_fence,
    "boat": draw_boat,
    "bridge": draw_bridge,
    "lamp": draw_lamp,
    "birds": draw_birds,
    "path": draw_path,
    "stack": draw_stack,
}
