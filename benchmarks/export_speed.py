"""Export speed: polygons per second and 10 000 regions end to end.

Prints ONE JSON line:

``polygons_per_s``
    Regions outlined per second by ``mask_to_polygons`` (3 classes, default settings) on
    a seeded 4000 x 4000 mask holding 10 000 plant-like blobs.
``seconds_10k``
    Seconds for the same 10 000 regions end to end: outlines, tile properties (a
    256/32 tile grid) and GeoJSON features reprojected from UTM to WGS 84.
``demo_export_s``
    Seconds of the full export of a project given with ``--project DIR`` (needs the
    project store, wired by the workflow); null with a note when not given.

Wall-clock and CPU seconds are both printed, with the 1-minute load average: on a shared
machine the wall-clock figures include waiting for a core.

Targets: at least 5000 polygons/s, 10 000 regions in under 5 s.

Usage: ``.venv/bin/python benchmarks/export_speed.py [--project DIR] [--seed N]``
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time
from pathlib import Path

import numpy as np
from affine import Affine

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from labeler.export.geojson import TileInfo, image_feature_collection  # noqa: E402
from labeler.imagery.tiling import tile_grid  # noqa: E402
from labeler.masks.polygons import mask_to_polygons  # noqa: E402

CELL = 40
GRID = 100  # 100 x 100 cells of 40 px: a 4000 x 4000 mask, one blob per cell


def blob_mask(seed: int) -> np.ndarray:
    """Seeded mask with one wavy ellipse of class 1, 2 or 3 in each 40 x 40 cell.

    Centres lie 14..26 px into the cell and radii stay under 12.7 px, so blobs of
    neighbouring cells never touch: the mask holds exactly GRID * GRID regions.
    """
    rng = np.random.default_rng(seed)
    n = GRID * GRID
    cy, cx = rng.uniform(14, 26, (2, n, 1, 1)).astype(np.float32)
    a, b = rng.uniform(5, 11, (2, n, 1, 1)).astype(np.float32)
    theta = rng.uniform(0, np.pi, (n, 1, 1)).astype(np.float32)
    phase = rng.uniform(0, 2 * np.pi, (n, 1, 1)).astype(np.float32)
    cls = rng.integers(1, 4, n).astype(np.uint8)
    rr, cc = np.indices((CELL, CELL), dtype=np.float32)
    y = rr[None] + 0.5 - cy
    x = cc[None] + 0.5 - cx
    u = (x * np.cos(theta) + y * np.sin(theta)) / a
    v = (-x * np.sin(theta) + y * np.cos(theta)) / b
    radius = 1.0 + 0.15 * np.sin(3.0 * np.arctan2(v, u) + phase)
    inside = u * u + v * v < radius * radius
    cells = np.where(inside, cls[:, None, None], 0).astype(np.uint8)
    return cells.reshape(GRID, GRID, CELL, CELL).transpose(0, 2, 1, 3).reshape(
        GRID * CELL, GRID * CELL
    )


def demo_export_seconds(project_dir: Path | None) -> tuple[float, str]:
    """Seconds of ``export_project`` (GeoJSON + PNG masks + manifest) of a project.

    Without ``project_dir`` a demo project is built in a temporary folder from
    ``demo_fields/`` and every tile gets its invented truth (imported as one annotator), so
    the whole field is exported.
    """
    import tempfile

    from labeler.demo.build import build_demo_project, demo_images, truth_path
    from labeler.project import open_project
    from labeler.workflow import export_project, import_masks

    with tempfile.TemporaryDirectory() as tmp:
        if project_dir is None:
            project, _ = build_demo_project(Path(tmp) / "demo")
            for plot in demo_images():
                import_masks(project, [truth_path(plot)], annotator="survey", image=plot.stem)
            note = "demo project from demo_fields/, every tile labelled (truth imported)"
        else:
            project = open_project(project_dir)
            note = f"project {project_dir}"
        with project:
            t0 = time.perf_counter()
            export_project(project, Path(tmp) / "out")
            return round(time.perf_counter() - t0, 3), note


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--project", type=Path, default=None, help="project folder to export")
    parser.add_argument("--seed", type=int, default=0)
    args = parser.parse_args()

    mask = blob_mask(args.seed)
    t0, c0 = time.perf_counter(), time.process_time()
    n_regions = sum(len(mask_to_polygons(mask, class_index=c)) for c in (1, 2, 3))
    polygon_s, polygon_cpu = time.perf_counter() - t0, time.process_time() - c0

    windows = tile_grid(*mask.shape, size=256, overlap=32)
    tiles = [TileInfo(k, "accepted", annotator="bench") for k in range(len(windows))]
    transform = Affine(0.01, 0.0, 431_000.0, 0.0, -0.01, 4_583_000.0)  # 1 cm, UTM 31N
    t0, c0 = time.perf_counter(), time.process_time()
    fc = image_feature_collection(
        mask, image="bench", transform=transform, crs="EPSG:32631", windows=windows, tiles=tiles
    )
    end_to_end_s, end_to_end_cpu = time.perf_counter() - t0, time.process_time() - c0

    demo_s, note = demo_export_seconds(args.project)

    print(
        json.dumps(
            {
                "polygons_per_s": round(n_regions / polygon_s, 1),
                "seconds_10k": round(end_to_end_s * 10_000 / max(len(fc["features"]), 1), 3),
                "regions": n_regions,
                "features": len(fc["features"]),
                "polygon_seconds": round(polygon_s, 3),
                "polygon_cpu_seconds": round(polygon_cpu, 3),
                "end_to_end_seconds": round(end_to_end_s, 3),
                "end_to_end_cpu_seconds": round(end_to_end_cpu, 3),
                "load_average_1min": round(os.getloadavg()[0], 2),
                "mask_shape": list(mask.shape),
                "tiles": len(windows),
                "demo_export_s": demo_s,
                "note": note,
            }
        )
    )


if __name__ == "__main__":
    main()
