"""Drawing the demo scenario: soil textures, stones, and crop and weed plant shapes.

Every shape is rasterised once (:func:`rasterise`) so that the image colour and the truth
class of a pixel come from the same drawing (see :mod:`labeler.demo.fields`). All
randomness comes from the generator the caller passes.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import cv2
import numpy as np

__all__ = [
    "noise_field",
    "soil_texture",
    "patch",
    "draw_stones",
    "Plant",
    "plant_colour",
    "crop_plant",
    "grass_weed",
    "broadleaf_weed",
    "rasterise",
]


# -- textures ---------------------------------------------------------------------------


def noise_field(rng: np.random.Generator, shape: tuple[int, int], scale: float) -> np.ndarray:
    """Smooth noise of zero mean and unit standard deviation with features of ``scale`` px."""
    h, w = shape
    gh = max(2, int(math.ceil(h / scale)) + 2)
    gw = max(2, int(math.ceil(w / scale)) + 2)
    coarse = rng.standard_normal((gh, gw)).astype(np.float32)
    big = cv2.resize(
        coarse, (int(round(gw * scale)), int(round(gh * scale))), interpolation=cv2.INTER_CUBIC
    )
    out = big[:h, :w].astype(np.float64)
    sd = out.std()
    return (out - out.mean()) / (sd if sd > 0 else 1.0)


def soil_texture(rng: np.random.Generator, shape: tuple[int, int]) -> tuple[np.ndarray, np.ndarray]:
    """Brown loam with clods and moist patches; returns (rgb float, moisture 0..1)."""
    h, w = shape
    base = np.array([139.0, 96.0, 74.0]) * rng.uniform(0.9, 1.08)
    base = base * (1.0 + rng.normal(0.0, 0.03, 3))
    tex = (
        0.05 * noise_field(rng, shape, 90.0)
        + 0.05 * noise_field(rng, shape, 22.0)
        + 0.06 * noise_field(rng, shape, 6.0)
        + 0.05 * rng.standard_normal(shape)
    )
    moist_field = noise_field(rng, shape, 160.0) + 0.35 * noise_field(rng, shape, 40.0)
    level = rng.uniform(0.4, 1.1)
    moisture = np.clip((moist_field - level) / 0.6, 0.0, 1.0)
    moisture = moisture * moisture * (3 - 2 * moisture)  # smoothstep
    rgb = base[None, None, :] * (1.0 + tex)[..., None]
    wet = np.array([0.76, 0.73, 0.73])  # moist loam is darker, a touch redder
    rgb = rgb * (1.0 - moisture[..., None] * (1.0 - wet[None, None, :]))
    return rgb, moisture


def patch(centre: tuple[float, float], radius: float, shape: tuple[int, int]):
    """Slices and local coordinates (rows, cols relative to ``centre``) of a square patch."""
    h, w = shape
    r0 = max(0, int(math.floor(centre[0] - radius)))
    r1 = min(h, int(math.ceil(centre[0] + radius)) + 1)
    c0 = max(0, int(math.floor(centre[1] - radius)))
    c1 = min(w, int(math.ceil(centre[1] + radius)) + 1)
    if r0 >= r1 or c0 >= c1:
        return None
    rr = np.arange(r0, r1, dtype=np.float64)[:, None] - centre[0]
    cc = np.arange(c0, c1, dtype=np.float64)[None, :] - centre[1]
    return (slice(r0, r1), slice(c0, c1)), rr, cc


def draw_stones(
    rng: np.random.Generator, rgb: np.ndarray, light: tuple[float, float]
) -> None:
    """Paint stones (soil class) into ``rgb`` in place: shaded ellipses with a shadow."""
    h, w = rgb.shape[:2]
    n = int(rng.integers(25, 90))
    for _ in range(n):
        centre = (rng.uniform(0, h), rng.uniform(0, w))
        a = rng.uniform(1.8, 9.0)
        b = a * rng.uniform(0.55, 1.0)
        phi = rng.uniform(0, math.pi)
        tone = rng.uniform(135, 205)
        colour = np.array([tone * 1.03, tone, tone * 0.93]) * (1 + rng.normal(0, 0.03, 3))
        got = patch(centre, a + 3.0, (h, w))
        if got is None:
            continue
        sl, rr, cc = got
        u = rr * math.cos(phi) + cc * math.sin(phi)
        v = -rr * math.sin(phi) + cc * math.cos(phi)
        q = (u / a) ** 2 + (v / b) ** 2
        inside = q <= 1.0
        su = (rr - light[0] * 1.6) * math.cos(phi) + (cc - light[1] * 1.6) * math.sin(phi)
        sv = -(rr - light[0] * 1.6) * math.sin(phi) + (cc - light[1] * 1.6) * math.cos(phi)
        shadow = ((su / a) ** 2 + (sv / b) ** 2 <= 1.0) & ~inside
        region = rgb[sl]
        region[shadow] *= 0.72
        lit = 1.0 + 0.18 * (-(rr * light[0] + cc * light[1]) / max(a, 1.0)).clip(-1, 1)
        shade = (lit * (1.0 - 0.12 * q))[inside]
        region[inside] = colour[None, :] * shade[:, None]


# -- plants -----------------------------------------------------------------------------


@dataclass
class Plant:
    kind: str  # "crop", "grass", "broadleaf"
    centre: tuple[float, float]
    radius: float  # bounding radius in px
    leaves: list[tuple[float, ...]]  # per leaf: angle, length, width, bend, gain
    colour: np.ndarray  # base RGB
    z: float


def plant_colour(rng: np.random.Generator, kind: str) -> np.ndarray:
    """Base RGB of a plant. Crop and weed colours overlap on purpose."""
    g = rng.uniform(92.0, 168.0)
    if kind == "crop":
        rg, bg = rng.uniform(0.44, 0.76), rng.uniform(0.30, 0.56)
    elif kind == "grass":
        rg, bg = rng.uniform(0.48, 0.82), rng.uniform(0.26, 0.50)
    else:
        rg, bg = rng.uniform(0.46, 0.80), rng.uniform(0.28, 0.54)
    return np.array([g * rg, g, g * bg])


def crop_plant(rng: np.random.Generator, centre: tuple[float, float], size: float) -> Plant:
    n = int(rng.integers(6, 11))
    phase = rng.uniform(0, 2 * math.pi)
    leaves = []
    for i in range(n):
        angle = phase + 2 * math.pi * i / n + rng.normal(0, 0.18)
        young = i >= n - 2  # the two youngest leaves are shorter
        length = size * rng.uniform(0.78, 1.05) * (rng.uniform(0.5, 0.7) if young else 1.0)
        width = length * rng.uniform(0.36, 0.47)
        bend = rng.normal(0, 0.12)
        gain = rng.uniform(0.88, 1.1)
        leaves.append((angle, length, width, bend, gain))
    leaves.sort(key=lambda leaf: -leaf[1])  # older, longer leaves below younger ones
    return Plant("crop", centre, size * 1.1 + 2, leaves, plant_colour(rng, "crop"), 0.0)


def grass_weed(rng: np.random.Generator, centre: tuple[float, float]) -> Plant:
    n = int(rng.integers(2, 7))
    main = rng.uniform(0, 2 * math.pi)
    scale = rng.uniform(0.45, 1.0)
    leaves = []
    for _ in range(n):
        angle = main + rng.normal(0, 0.7)
        length = rng.uniform(14.0, 46.0) * scale
        half_width = rng.uniform(1.1, 1.75)
        bend = rng.normal(0, 0.35)
        leaves.append((angle, length, half_width, bend, rng.uniform(0.9, 1.1)))
    radius = max(leaf[1] for leaf in leaves) + 3
    return Plant("grass", centre, radius, leaves, plant_colour(rng, "grass"), 0.0)


def broadleaf_weed(rng: np.random.Generator, centre: tuple[float, float]) -> Plant:
    n = int(rng.choice([2, 2, 3, 4, 4, 5, 6]))
    scale = rng.uniform(0.5, 1.0)
    phase = rng.uniform(0, 2 * math.pi)
    leaves = []
    for i in range(n):
        angle = phase + 2 * math.pi * i / n + rng.normal(0, 0.25)
        blade = rng.uniform(3.0, 8.0) * scale + 1.5  # blade radius
        length = blade * rng.uniform(2.2, 2.7)
        width = 2 * blade * rng.uniform(0.78, 1.0)
        leaves.append((angle, length, width, rng.normal(0, 0.1), rng.uniform(0.9, 1.1)))
    radius = max(leaf[1] for leaf in leaves) + 3
    return Plant("broadleaf", centre, radius, leaves, plant_colour(rng, "broadleaf"), 0.0)


def rasterise(plant: Plant, shape: tuple[int, int]):
    """Leaf pixels of ``plant``: (slices, leaf index (-1 none), shading factor) or None."""
    got = patch(plant.centre, plant.radius, shape)
    if got is None:
        return None
    sl, rr, cc = got
    owner = np.full(np.broadcast_shapes(rr.shape, cc.shape), -1, np.int16)
    shade = np.ones(owner.shape, np.float64)
    for k, (angle, length, width, bend, gain) in enumerate(plant.leaves):
        ca, sa = math.cos(angle), math.sin(angle)
        u = rr * ca + cc * sa
        v = -rr * sa + cc * ca
        vb = v - bend * u * u / max(length, 1.0)
        if plant.kind == "grass":
            t = np.clip(u / length, 0.0, 1.0)
            half = width * (1.0 - 0.55 * t**1.5)
            inside = (u >= 0) & (u <= length) & (np.abs(vb) <= half)
            leaf_shade = gain * (1.0 + 0.12 * (vb / np.maximum(half, 0.5)) * 0.5 - 0.1 * (1 - t))
        else:
            if plant.kind == "crop":
                stalk = 0.3 * length
                stalk_half = 1.1
            else:
                stalk = length - width  # short petiole, round blade
                stalk_half = 0.8
            a = (length - stalk) / 2.0
            uc = stalk + a
            b = width / 2.0
            du = (u - uc) / a
            taper = 1.0 - 0.18 * du if plant.kind == "crop" else 1.0
            blade = du**2 + (vb / (b * np.maximum(taper, 0.3))) ** 2 <= 1.0
            petiole = (u >= 0) & (u <= stalk + 1.0) & (np.abs(vb) <= stalk_half)
            inside = blade | petiole
            midrib = blade & (np.abs(vb) <= 0.75) & (du < 0.8)
            leaf_shade = gain * (
                1.0 + 0.08 * np.clip(vb / b, -1, 1) - 0.12 * np.clip(1 - u / length, 0, 1)
            )
            leaf_shade = np.where(midrib, leaf_shade * 1.12, leaf_shade)
            leaf_shade = np.where(petiole & ~blade, leaf_shade * 1.06, leaf_shade)
        owner[inside] = k
        shade = np.where(inside, leaf_shade, shade)
    if (owner < 0).all():
        return None
    return sl, owner, shade
