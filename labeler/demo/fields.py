"""The invented demo scenario: sugar beet sample frames from Brackenlow Farm.

Brackenlow Farm is an invented mixed arable farm on a gentle loam terrace above the
(equally invented) river Arvel. Its agronomist photographs small sample frames of the
beet fields from a ground robot at about 4 mm per pixel, early in the season when the
beet stands at six to ten leaves: rosettes in rows about 0.48 m apart, a plant every
0.19 m or so, with gaps where seed failed. Between and inside the rows come up two kinds
of weed: grass-like weeds (thin, slightly curved blades from one base) and broadleaf
weeds (small rounded leaves), some of them touching the beet. Some beet leaves carry
leaf-spot lesions: small round necrotic spots, tan to grey in the centre with a dark
reddish-brown rim and a faint chlorotic halo. The soil is a brown loam with clods,
moister dark patches, scattered stones, plant shadows, and sometimes the soft shadow of
the hedge; light falls off towards one side of the frame and the sensor adds a little
noise.

Nothing here depicts a real farm, field or survey. The images serve only to exercise the
labelling loop.

Ground truth is exact: every shape (leaf, blade, stone, lesion) is rasterised once, and
the same pixels receive both the colour in the image and the class in the truth mask
(the default schema of :mod:`labeler.classes`: 0 soil, 1 crop, 2 weed, 3 symptom). Only
the image is blurred a little at the end (lens softness), so edges blend in the image but
never in the truth. A lesion's symptom pixels are its centre and rim on the visible leaf;
the halo changes the colour of surrounding leaf pixels, which stay crop.

Crop and weed are given overlapping colours on purpose: a colour index alone cannot
tell them apart; only where a plant grows (on the row or between rows) and its shape
can.

Run ``python -m labeler.demo.fields OUT_DIR`` to write the scenario (GeoTIFFs in
EPSG:32631, UTM zone 31 N, plus ``<plot>_truth.png`` masks and ``scenario.json``).
"""

from __future__ import annotations

import argparse
import json
import math
import sys
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from datetime import date, datetime, timedelta
from pathlib import Path

import cv2
import numpy as np
from affine import Affine
from scipy import ndimage

from labeler.demo.drawing import (
    Plant,
    broadleaf_weed,
    crop_plant,
    draw_stones,
    grass_weed,
    noise_field,
    patch,
    rasterise,
    soil_texture,
)
from labeler.fileio import atomic_write_bytes
from labeler.imagery.write import write_geotiff, write_png

__all__ = [
    "FARM",
    "CROP",
    "PLOT_NAMES",
    "DEFAULT_SEED",
    "DEFAULT_SIZE",
    "GSD_M",
    "CRS",
    "Plot",
    "plot_seed",
    "make_plot",
    "write_scenario",
    "truth_path_for",
    "main",
]

#: The invented farm.
FARM = "Brackenlow Farm"
#: The crop of the scenario.
CROP = "sugar beet"
#: Invented plot names, in the order :func:`write_scenario` uses them.
PLOT_NAMES = (
    "long-acre",
    "mill-piece",
    "hollow-end",
    "far-terrace",
    "gate-strip",
    "pond-corner",
    "top-ley",
    "arvel-bank",
)
#: Seed of the committed demo scenario.
DEFAULT_SEED = 1907
#: (height, width) of a committed demo plot in pixels.
DEFAULT_SIZE = (768, 1024)
#: Ground sampling distance in metres per pixel.
GSD_M = 0.004
#: Coordinate reference system of the demo images (WGS 84 / UTM zone 31 N).
CRS = "EPSG:32631"

# Invented farm yard position (easting, northing in EPSG:32631) and sample frame offsets
# in metres from it, one per plot name.
_FARM_XY = (512_430.0, 5_563_870.0)
_PLOT_OFFSETS_M = (
    (-418.0, 306.0),
    (-131.0, 262.0),
    (214.0, 341.0),
    (-297.0, -184.0),
    (63.0, -239.0),
    (388.0, -121.0),
    (-52.0, 488.0),
    (471.0, 167.0),
)

SOIL, CROP_CLASS, WEED, SYMPTOM = 0, 1, 2, 3


@dataclass(frozen=True)
class Plot:
    """One generated sample frame.

    Attributes
    ----------
    name : str
        Plot name (also the file stem).
    image : ndarray, shape (H, W, 3), uint8
        The RGB photograph.
    truth : ndarray, shape (H, W), uint8
        Exact classes: 0 soil, 1 crop, 2 weed, 3 symptom.
    transform : affine.Affine
        Pixel-corner transform to ``crs`` (``transform * (col, row)`` = easting, northing).
    crs : str
        ``"EPSG:32631"`` unless asked otherwise.
    metadata : dict
        Scenario facts: farm, crop, seed, ground sampling distance, row angle and spacing,
        counts of plants, weeds and lesions. JSON-serialisable.
    """

    name: str
    image: np.ndarray
    truth: np.ndarray
    transform: Affine
    crs: str
    metadata: dict = field(default_factory=dict)


def plot_seed(seed: int, index: int) -> int:
    """Seed of the ``index``-th plot of a scenario with seed ``seed`` (stable, 32 bits)."""
    return int(np.random.SeedSequence([int(seed), int(index)]).generate_state(1)[0])


def truth_path_for(image_path: str | Path) -> Path:
    """``<folder>/<plot>_truth.png`` beside ``<folder>/<plot>.tif``."""
    p = Path(image_path)
    return p.with_name(f"{p.stem}_truth.png")


# --------------------------------------------------------------------------------------
# layout


def _row_layout(rng: np.random.Generator, shape: tuple[int, int]) -> dict:
    """Row direction, spacing, curvature and the crop plant positions."""
    h, w = shape
    base = float(rng.choice([0.0, 90.0]))
    tilt = float(rng.uniform(3.0, 16.0)) * float(rng.choice([-1.0, 1.0]))
    theta = math.radians(base + tilt)
    spacing = rng.uniform(0.45, 0.50) / GSD_M
    step = rng.uniform(0.17, 0.21) / GSD_M
    bow = rng.uniform(-14.0, 14.0)  # px of sideways bow over the frame
    wave_amp, wave_len = rng.uniform(0.0, 4.0), rng.uniform(250.0, 600.0)
    wave_phase = rng.uniform(0, 2 * math.pi)
    nr, nc = math.cos(theta), math.sin(theta)  # normal (row, col)
    dr, dc = -math.sin(theta), math.cos(theta)  # along the rows
    corners = np.array([[0, 0], [0, w], [h, 0], [h, w]], np.float64)
    t_all = corners[:, 0] * nr + corners[:, 1] * nc
    s_all = corners[:, 0] * dr + corners[:, 1] * dc
    s_lo, s_hi = s_all.min() - 40, s_all.max() + 40
    s_mid, s_half = (s_lo + s_hi) / 2, (s_hi - s_lo) / 2
    t0 = t_all.min() + rng.uniform(0, spacing)
    offsets = np.arange(t0 - spacing, t_all.max() + spacing, spacing)

    def centre_offset(s: np.ndarray | float) -> np.ndarray | float:
        x = (np.asarray(s) - s_mid) / s_half
        return bow * x * x + wave_amp * np.sin(2 * np.pi * np.asarray(s) / wave_len + wave_phase)

    plants = []
    for t_row in offsets:
        t_row = t_row + rng.normal(0, 2.0)
        s = s_lo + rng.uniform(0, step)
        gap_left = 0
        while s < s_hi:
            if gap_left == 0 and rng.random() < 0.035:
                gap_left = int(rng.integers(2, 6))  # a stretch where seed failed
            skip = gap_left > 0 or rng.random() < 0.08
            gap_left = max(0, gap_left - 1)
            if not skip:
                t = t_row + centre_offset(s) + rng.normal(0, 2.2)
                sj = s + rng.normal(0, 0.07 * step)
                plants.append((t * nr + sj * dr, t * nc + sj * dc))
            s += step * rng.uniform(0.85, 1.15)
    return dict(
        theta=theta, spacing=spacing, step=step, offsets=offsets, plants=plants,
        centre_offset=centre_offset, normal=(nr, nc), along=(dr, dc), tilt=tilt, base=base,
        s_range=(s_lo, s_hi),
    )


def make_plot(
    name: str,
    *,
    seed: int,
    height: int = DEFAULT_SIZE[0],
    width: int = DEFAULT_SIZE[1],
    origin_xy: tuple[float, float] | None = None,
    crs: str = CRS,
    gsd_m: float = GSD_M,
    weed_density: float = 1.0,
    symptom_share: float = 0.25,
    growth: float = 1.0,
    light_seed: int | None = None,
) -> Plot:
    """Generate one invented sample frame of a beet field and its exact truth.

    Parameters
    ----------
    name : str
        Plot name, recorded in the metadata.
    seed : int
        Seed of all randomness: the same seed (and options) gives identical arrays.
    height, width : int
        Image size in pixels, at least 32 each.
    origin_xy : (float, float), optional
        Easting and northing of the image's top-left corner in ``crs``; default: a
        position on the invented farm derived from ``name``.
    crs : str
        Coordinate reference system written with the image.
    gsd_m : float
        Ground sampling distance recorded in the transform (the drawing itself is scaled
        for :data:`GSD_M`, about 4 mm per pixel).
    weed_density : float
        Multiplies the number of weeds (1.0: about 18 weeds per square metre).
    symptom_share : float
        Share of beet plants that carry leaf-spot lesions, 0..1.
    growth : float
        Multiplies the size of every beet plant (1.0 as first seen; a later visit
        shows the same plants grown, e.g. 1.15). All random draws stay the same.
    light_seed : int, optional
        Seeds the light alone (sun direction and shadows, the hedge's shadow, uneven
        light, white balance, sensor noise): the same ground under another sky. Default:
        drawn from ``seed`` like everything else.

    Returns
    -------
    Plot
        ``image`` (H, W, 3) uint8, ``truth`` (H, W) uint8 in {0, 1, 2, 3}, ``transform``,
        ``crs`` and ``metadata``.
    """
    if height < 32 or width < 32:
        raise ValueError(
            f"height, width: expected at least 32 pixels each, got {height} x {width}"
        )
    if gsd_m <= 0:
        raise ValueError(f"gsd_m: expected a positive ground sampling distance, got {gsd_m}")
    if weed_density < 0:
        raise ValueError(f"weed_density: expected a factor >= 0, got {weed_density}")
    if not 0.0 <= symptom_share <= 1.0:
        raise ValueError(f"symptom_share: expected a share in 0..1, got {symptom_share}")
    if not 0.5 <= growth <= 2.0:
        raise ValueError(f"growth: expected a size factor in 0.5..2, got {growth}")
    shape = (int(height), int(width))
    h, w = shape
    streams = np.random.SeedSequence(int(seed)).spawn(6)
    rng_layout, rng_soil, rng_weeds, rng_spots, rng_light, rng_colour = (
        np.random.default_rng(s) for s in streams
    )
    if light_seed is not None:
        rng_light = np.random.default_rng(np.random.SeedSequence([int(seed), int(light_seed)]))

    light_angle = rng_light.uniform(0, 2 * math.pi)
    light = (math.cos(light_angle), math.sin(light_angle))  # direction shadows fall

    soil, moisture = soil_texture(rng_soil, shape)
    draw_stones(rng_soil, soil, light)

    layout = _row_layout(rng_layout, shape)
    plants: list[Plant] = []
    for centre in layout["plants"]:
        size = rng_layout.uniform(19.0, 31.0) * growth
        plants.append(crop_plant(rng_colour, centre, size))
    crop_plants = list(plants)

    n_weeds = int(round(rng_weeds.uniform(0.8, 1.25) * 18.0 * h * w * GSD_M**2 * weed_density))
    nr, nc = layout["normal"]
    dr, dc = layout["along"]
    for _ in range(n_weeds):
        where = rng_weeds.random()
        if where < 0.22 and crop_plants:
            host = crop_plants[int(rng_weeds.integers(len(crop_plants)))]
            ang = rng_weeds.uniform(0, 2 * math.pi)
            dist = host.radius * rng_weeds.uniform(0.75, 1.05)
            centre = (host.centre[0] + dist * math.cos(ang), host.centre[1] + dist * math.sin(ang))
        elif where < 0.40 and len(layout["offsets"]):
            # inside a row, between the beet plants
            t_row = float(rng_weeds.choice(layout["offsets"]))
            s = rng_weeds.uniform(*layout["s_range"])
            t = t_row + float(layout["centre_offset"](s)) + rng_weeds.normal(0, 7.0)
            centre = (t * nr + s * dr, t * nc + s * dc)
        else:
            centre = (rng_weeds.uniform(-10, h + 10), rng_weeds.uniform(-10, w + 10))
        if not (-40 < centre[0] < h + 40 and -40 < centre[1] < w + 40):
            continue
        if rng_weeds.random() < 0.45:
            plants.append(grass_weed(rng_weeds, centre))
        else:
            plants.append(broadleaf_weed(rng_weeds, centre))

    # painter's order: mostly weeds under the beet canopy, some on top
    for p in plants:
        p.z = rng_layout.uniform(0.35, 1.0) if p.kind == "crop" else rng_weeds.uniform(0.0, 0.75)
    order = sorted(range(len(plants)), key=lambda i: plants[i].z)

    image = soil.copy()
    truth = np.zeros(shape, np.uint8)
    owner = np.full(shape, -1, np.int32)
    leaf_tex = 1.0 + 0.045 * noise_field(rng_colour, shape, 3.0)
    for i in order:
        p = plants[i]
        got = rasterise(p, shape)
        if got is None:
            continue
        sl, leaf, shade = got
        inside = leaf >= 0
        cls = CROP_CLASS if p.kind == "crop" else WEED
        truth[sl][inside] = cls
        owner[sl][inside] = i
        colour = p.colour[None, None, :] * (shade * leaf_tex[sl])[..., None]
        image[sl][inside] = colour[inside]

    # shadows of the canopy on the soil (image only)
    canopy = (truth > 0).astype(np.float64)
    shift = rng_light.uniform(2.5, 5.0)
    cast = ndimage.shift(canopy, (light[0] * shift, light[1] * shift), order=1, mode="constant")
    cast = ndimage.gaussian_filter(cast, 2.0)
    soil_px = truth == SOIL
    image[soil_px] *= (1.0 - 0.38 * np.clip(cast[soil_px], 0, 1))[:, None]

    # leaf-spot lesions on some beet plants
    n_spots = 0
    spot_plants = 0
    for i, p in enumerate(plants):
        if p.kind != "crop" or rng_spots.random() >= symptom_share:
            continue
        got = patch(p.centre, p.radius + 9, shape)
        if got is None:
            continue
        sl, rr, cc = got
        visible = owner[sl] == i
        if visible.sum() < 30:
            continue
        spot_plants += 1
        ys, xs = np.nonzero(visible)
        for _ in range(int(rng_spots.integers(1, 6))):
            k = int(rng_spots.integers(ys.size))
            radius = float(rng_spots.choice([1.3, 1.5, 1.8, 2.2, 2.6, 3.2, 4.2, 5.6, 7.2]))
            radius *= rng_spots.uniform(0.9, 1.1)
            yy = np.arange(visible.shape[0])[:, None] - (ys[k] + rng_spots.uniform(-0.5, 0.5))
            xx = np.arange(visible.shape[1])[None, :] - (xs[k] + rng_spots.uniform(-0.5, 0.5))
            d = np.sqrt(yy * yy + xx * xx)
            lesion = (d <= radius) & visible
            if not lesion.any():
                continue
            n_spots += 1
            centre_rgb = np.array([172.0, 150.0, 112.0]) * rng_spots.uniform(0.85, 1.1)
            rim_rgb = np.array([112.0, 64.0, 44.0]) * rng_spots.uniform(0.85, 1.1)
            halo_rgb = np.array([176.0, 168.0, 78.0])
            region = image[sl]
            rim = lesion & (d > radius - 1.1)
            core = lesion & ~rim
            region[core] = centre_rgb * (1 + 0.05 * rng_spots.standard_normal((core.sum(), 1)))
            region[rim] = rim_rgb
            halo = visible & ~lesion & (d <= radius + 2.2)
            if halo.any():
                a = (0.55 * (1.0 - (d[halo] - radius) / 2.2))[:, None]
                region[halo] = region[halo] * (1 - a) + halo_rgb[None, :] * a
            truth[sl][lesion] = SYMPTOM

    # the soft shadow of the hedge on some frames
    hedge = rng_light.random() < 0.35
    if hedge:
        rows, cols = np.indices(shape, dtype=np.float64)
        ang = rng_light.uniform(0, 2 * math.pi)
        edge = (rows - h / 2) * math.cos(ang) + (cols - w / 2) * math.sin(ang)
        edge = edge + 25.0 * noise_field(rng_light, shape, 120.0)
        cut = rng_light.uniform(0.25, 0.45) * min(h, w)
        image *= (1.0 - 0.42 / (1.0 + np.exp(-(edge - cut) / 18.0)))[..., None]

    # lens softness, uneven light, white balance and sensor noise
    image = cv2.GaussianBlur(image.astype(np.float32), (0, 0), 0.45).astype(np.float64)
    rows, cols = np.indices(shape, dtype=np.float64)
    g_ang = rng_light.uniform(0, 2 * math.pi)
    grad = ((rows - h / 2) * math.cos(g_ang) + (cols - w / 2) * math.sin(g_ang)) / max(h, w)
    vignette = ((rows - h / 2) ** 2 + (cols - w / 2) ** 2) / ((h / 2) ** 2 + (w / 2) ** 2)
    gain = 1.0 + rng_light.uniform(0.2, 0.4) * grad - 0.12 * vignette
    gain *= rng_light.uniform(0.92, 1.08)
    balance = 1.0 + rng_light.normal(0, 0.025, 3)
    image = image * gain[..., None] * balance[None, None, :]
    image += rng_light.normal(0, 2.0, image.shape)
    image = np.clip(np.rint(image), 0, 255).astype(np.uint8)

    if origin_xy is None:
        index = PLOT_NAMES.index(name) if name in PLOT_NAMES else None
        if index is None:
            digest = sum((i + 1) * ord(ch) for i, ch in enumerate(name))
            dx, dy = (digest % 900) - 450.0, ((digest // 900) % 700) - 350.0
        else:
            dx, dy = _PLOT_OFFSETS_M[index]
        origin_xy = (_FARM_XY[0] + dx, _FARM_XY[1] + dy)
    transform = Affine(gsd_m, 0.0, float(origin_xy[0]), 0.0, -gsd_m, float(origin_xy[1]))

    angle = math.degrees(layout["theta"]) % 180.0
    metadata = {
        "farm": FARM,
        "plot": name,
        "crop": CROP,
        "growth_stage": "6 to 10 leaves",
        "seed": int(seed),
        "gsd_m": float(gsd_m),
        "crs": crs,
        "origin_xy": [float(origin_xy[0]), float(origin_xy[1])],
        "row_angle_deg": round(angle, 3),
        "row_spacing_px": round(float(layout["spacing"]), 3),
        "plant_step_px": round(float(layout["step"]), 3),
        "n_crop_plants": len(crop_plants),
        "n_weeds": len(plants) - len(crop_plants),
        "n_lesions": n_spots,
        "n_plants_with_lesions": spot_plants,
        "hedge_shadow": bool(hedge),
        "growth": float(growth),
        "light_seed": None if light_seed is None else int(light_seed),
        "invented": True,
    }
    return Plot(name, image, truth, transform, crs, metadata)


def write_scenario(
    folder: str | Path,
    *,
    n_plots: int = 6,
    seed: int = DEFAULT_SEED,
    size: tuple[int, int] = DEFAULT_SIZE,
    jpeg_quality: int = 95,
    revisits: int = 0,
    first_date: date | None = None,
    revisit_days: int = 14,
    progress: Callable[[int, int], None] | None = None,
) -> list[Path]:
    """Write ``n_plots`` invented plots to ``folder``.

    Each plot ``<name>`` becomes ``<name>.tif`` (JPEG-compressed GeoTIFF) and
    ``<name>_truth.png`` (class mask); ``scenario.json`` lists the plots with their seeds
    and metadata. The first ``revisits`` plots are seen again ``revisit_days`` later
    (:func:`labeler.demo.revisit.make_revisit`) as ``<name>-later.tif``. With a ``first_date`` (or any
    revisits) every image carries its capture date in its TIFF ``DateTime`` tag. Files
    are written atomically.

    Parameters
    ----------
    folder : path
        Created if missing; existing files of the same names are replaced.
    n_plots : int
        1 or more; names beyond :data:`PLOT_NAMES` get a number.
    seed : int
        Scenario seed; plot ``i`` uses ``plot_seed(seed, i)``.
    size : (int, int)
        ``(height, width)`` of each plot.
    revisits : int
        Plots (the first ones) seen again on a later date, 0 to ``n_plots``.
    first_date : date, optional
        The day of the first visit (default 14 May 2027 when there are revisits).
    revisit_days : int
        Days between the two visits, at least 1.
    progress : callable, optional
        Called as ``progress(done, total)`` after each plot.

    Returns
    -------
    paths : list of Path
        The GeoTIFF paths in plot order, then the revisits (truth beside each:
        :func:`truth_path_for`).
    """
    if not 0 <= revisits <= n_plots:
        raise ValueError(f"revisits: expected 0 to n_plots ({n_plots}) plots, got {revisits}")
    if revisit_days < 1:
        raise ValueError(f"revisit_days: expected at least 1 day, got {revisit_days}")
    if first_date is None and revisits:
        first_date = date(2027, 5, 14)
    taken = None if first_date is None else datetime(first_date.year, first_date.month, first_date.day, 10)
    if n_plots < 1:
        raise ValueError(f"n_plots: expected at least 1 plot, got {n_plots}")
    if len(size) != 2:
        raise ValueError(f"size: expected (height, width), got {size!r}")
    out = Path(folder)
    out.mkdir(parents=True, exist_ok=True)
    paths: list[Path] = []
    entries = []
    jobs = [(i, False) for i in range(n_plots)] + [(i, True) for i in range(revisits)]
    for k, (i, later) in enumerate(jobs):
        name = PLOT_NAMES[i] if i < len(PLOT_NAMES) else f"plot-{i + 1:02d}"
        when = taken
        if later:
            from labeler.demo.revisit import make_revisit  # it builds on make_plot

            plot = make_revisit(name, seed=plot_seed(seed, i), height=size[0], width=size[1])
            when = taken + timedelta(days=revisit_days)  # type: ignore[operator]
        else:
            plot = make_plot(name, seed=plot_seed(seed, i), height=size[0], width=size[1])
        stem = f"{name}-later" if later else name
        tif = write_geotiff(
            out / f"{stem}.tif", plot.image, transform=plot.transform, crs=plot.crs,
            compress="jpeg", jpeg_quality=jpeg_quality, taken=when,
        )
        write_png(truth_path_for(tif), plot.truth)
        paths.append(tif)
        entry = {"image": tif.name, "truth": truth_path_for(tif).name, **plot.metadata}
        if when is not None:
            entry["captured"] = when.date().isoformat()
        entries.append(entry)
        if progress is not None:
            progress(k + 1, len(jobs))
    manifest = {
        "scenario": f"{FARM}, {CROP} sample frames (invented)",
        "seed": int(seed),
        "size": [int(size[0]), int(size[1])],
        "classes": {"0": "soil", "1": "crop", "2": "weed", "3": "symptom"},
        "plots": entries,
    }
    atomic_write_bytes(out / "scenario.json", (json.dumps(manifest, indent=2) + "\n").encode())
    return paths


def main(argv: Sequence[str] | None = None) -> int:
    """Command line: ``python -m labeler.demo.fields OUT_DIR [--plots N] [--seed S]``."""
    parser = argparse.ArgumentParser(
        prog="python -m labeler.demo.fields",
        description=f"Write the invented {FARM} demo scenario (GeoTIFFs and truth masks).",
    )
    parser.add_argument("out_dir", type=Path, help="folder to write into")
    parser.add_argument("--plots", type=int, default=6, help="number of plots (default 6)")
    parser.add_argument("--seed", type=int, default=DEFAULT_SEED, help="scenario seed")
    parser.add_argument(
        "--revisits", type=int, default=0,
        help="plots seen again two weeks later, as <plot>-later.tif (default 0)",
    )
    parser.add_argument(
        "--size", type=int, nargs=2, default=list(DEFAULT_SIZE), metavar=("H", "W"),
        help="plot size in pixels (default 768 1024)",
    )
    args = parser.parse_args(argv)
    from tqdm import tqdm

    with tqdm(total=args.plots + args.revisits, desc="plots", unit="plot") as bar:
        paths = write_scenario(
            args.out_dir, n_plots=args.plots, seed=args.seed, size=tuple(args.size),
            revisits=args.revisits, progress=lambda done, total: bar.update(1),
        )
    for p in paths:
        print(p)
    return 0


if __name__ == "__main__":
    sys.exit(main())
