"""Peak memory of each command on one big orthomosaic (default 20000 x 20000 pixels).

Prints ONE JSON line. The figures are the peak resident memory (in MB) of each ``labeler``
command, each run as its own process and measured by that process itself: its
``VmHWM`` (high-water resident set, Linux ``/proc/self/status``) read at exit:

``add_mb``
    ``labeler add`` of the GeoTIFF (header check, every tile window read once, the copy).
``propose_mb``
    ``labeler propose`` (no head yet: the vegetation-index cold start plus the encoder
    features of every tile).
``import_mb``
    ``labeler import`` of a class mask of the whole image (PNG, one annotator).
``export_geojson_mb``, ``export_masks_mb``
    ``labeler export --format geojson`` and ``--format masks`` (class mask, colour
    preview, manifest) of the imported masks.
``agreement_mb``
    ``labeler agreement`` after a second annotator's whole-image mask is imported
    (every pixel compared, the HTML report drawn).

Also: ``limit_mb`` (1500, the target of each figure), ``within_limit`` (every figure at
most the limit), the seconds of each command, the image and file sizes, ``tiles``, the
1-minute load average and ``failures`` (a command that exited non-zero: its last error
line; its figure is still the peak of the failed run).

The field is generated, window by window, into a temporary folder (deleted at the end
unless ``--keep``): an invented plot of Brackenlow Farm at 1 cm per pixel in UTM zone 31N,
crop rows 75 px apart made of round plants, weeds scattered between them, a soil texture;
a JPEG-compressed tiled GeoTIFF (as drones' orthomosaics often are) and two annotators'
class masks of it as PNG (the second draws weeds 2 px larger and plants 1 px smaller).
Every pixel is a function of its position only, so windows agree at their edges.

Wall-clock seconds are from a machine that may be shared; peak memory depends little on
load. Needs a few GB of free disk (the image, its copy in the project, the feature
cache).

Usage: ``.venv/bin/python benchmarks/big_image_memory.py [--size 20000] [--keep]
[--workdir DIR] [--commands add,propose,import,export_geojson,export_masks,agreement]``
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from labeler.imagery.pngstream import PngRowWriter  # noqa: E402

COMMANDS = ("add", "propose", "import", "export_geojson", "export_masks", "agreement")
LIMIT_MB = 1500
ROW_SPACING = 75  # px between crop rows (75 cm at 1 cm per pixel)
PLANT_STEP = 24  # px between plants along a row
WEED_CELL = 150  # one weed candidate per cell of this many px
STRIP_ROWS = 512  # rows generated at once


def _hash(*keys: np.ndarray) -> np.ndarray:
    """A uint64 hash of integer arrays (splitmix64 finaliser), position-only noise."""
    h = np.uint64(0x9E3779B97F4A7C15)
    for k in keys:
        h = (h ^ k.astype(np.uint64)) * np.uint64(0xBF58476D1CE4E5B9)
        h ^= h >> np.uint64(31)
    h *= np.uint64(0x94D049BB133111EB)
    return h ^ (h >> np.uint64(29))


def field_classes(r0: int, r1: int, width: int, *, weed_grow: int = 0, plant_shrink: int = 0):
    """Class indices (0 soil, 1 crop, 2 weed) of rows ``r0:r1`` of the generated field."""
    with np.errstate(over="ignore"):
        rr = np.arange(r0, r1, dtype=np.int64)[:, None]
        cc = np.arange(width, dtype=np.int64)[None, :]
        # crop rows: columns near k * ROW_SPACING (drifting slowly), plants every PLANT_STEP
        drift = (6 * np.sin(rr / 900.0)).astype(np.int64)
        along = rr % PLANT_STEP - PLANT_STEP // 2
        across = (cc + drift) % ROW_SPACING - ROW_SPACING // 2
        row_id = (cc + drift) // ROW_SPACING
        plant = (rr // PLANT_STEP) * 100_003 + row_id
        radius = 9 + (_hash(plant) % np.uint64(4)).astype(np.int64) - plant_shrink
        crop = along * along + across * across <= radius * radius
        # weeds: one candidate blob per cell, in about half of the cells
        cr, ccell = rr // WEED_CELL, cc // WEED_CELL
        h = _hash(cr, ccell, np.int64(7))
        present = (h % np.uint64(2)) == 0
        wr = cr * WEED_CELL + (h >> np.uint64(8)) % np.uint64(WEED_CELL)
        wc = ccell * WEED_CELL + (h >> np.uint64(24)) % np.uint64(WEED_CELL)
        wrad = 4 + ((h >> np.uint64(40)) % np.uint64(8)).astype(np.int64) + weed_grow
        dr = rr - wr.astype(np.int64)
        dc = cc - wc.astype(np.int64)
        weed = present & (dr * dr + dc * dc <= wrad * wrad) & ~crop
    out = np.zeros((r1 - r0, width), np.uint8)
    out[crop] = 1
    out[weed] = 2
    return out


def field_rgb(classes: np.ndarray, r0: int) -> np.ndarray:
    """Colours of the classes with a position-only texture (soil brown, plants green)."""
    rows, width = classes.shape
    with np.errstate(over="ignore"):
        rr = np.arange(r0, r0 + rows, dtype=np.int64)[:, None]
        cc = np.arange(width, dtype=np.int64)[None, :]
        noise = (_hash(rr, cc) % np.uint64(17)).astype(np.int16) - 8
    palette = np.array([[121, 96, 72], [58, 138, 52], [96, 162, 66]], np.int16)
    rgb = palette[classes] + noise[:, :, None]
    return np.clip(rgb, 0, 255).astype(np.uint8)


def generate(folder: Path, size: int) -> dict[str, Path]:
    """Write the GeoTIFF and the two annotators' masks, strip by strip."""
    import rasterio
    from affine import Affine

    tif = folder / "brackenlow_big_plot.tif"
    masks = {
        "survey-a": folder / "brackenlow_big_plot_a" / "brackenlow_big_plot.png",
        "survey-b": folder / "brackenlow_big_plot_b" / "brackenlow_big_plot.png",
    }
    profile = dict(
        driver="GTiff", height=size, width=size, count=3, dtype="uint8", crs="EPSG:32631",
        transform=Affine(0.01, 0.0, 431_000.0, 0.0, -0.01, 4_583_000.0), tiled=True,
        blockxsize=256, blockysize=256, compress="jpeg", photometric="YCBCR", jpeg_quality=90,
        BIGTIFF="IF_SAFER",
    )
    from rasterio.windows import Window

    with (
        rasterio.open(tif, "w", **profile) as dst,
        PngRowWriter(masks["survey-a"], height=size, width=size, channels=1) as pa,
        PngRowWriter(masks["survey-b"], height=size, width=size, channels=1) as pb,
    ):
        for r0 in range(0, size, STRIP_ROWS):
            r1 = min(size, r0 + STRIP_ROWS)
            classes = field_classes(r0, r1, size)
            dst.write(np.moveaxis(field_rgb(classes, r0), 2, 0), window=Window(0, r0, size, r1 - r0))
            pa.write(classes)
            pb.write(field_classes(r0, r1, size, weed_grow=2, plant_shrink=1))
    return {"image": tif, **masks}


#: Runs one labeler command and writes its own peak RSS (VmHWM, kB) to a file at exit.
#: VmHWM belongs to the process's memory after exec; the rusage ru_maxrss of a child is
#: at least the parent's size when it forked, which would hide small figures.
_WRAPPER = """
import atexit, sys
def _report(path=sys.argv[1]):
    with open("/proc/self/status") as fh:
        hwm = [line.split()[1] for line in fh if line.startswith("VmHWM:")]
    with open(path, "w") as out:
        out.write(hwm[0] if hwm else "")
atexit.register(_report)
sys.argv = ["labeler", *sys.argv[2:]]
from labeler.cli import main
sys.exit(main())
"""


def run(cmd: list[str], log: Path) -> tuple[float, float, int, str]:
    """Run one labeler command; its peak RSS (MB), seconds, exit code, last error line."""
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    peak_file = log.with_suffix(".peak")
    t0 = time.perf_counter()
    with open(log, "w") as out:
        proc = subprocess.Popen(
            [sys.executable, "-c", _WRAPPER, str(peak_file), *cmd], stdout=out,
            stderr=subprocess.STDOUT, env=env, cwd=log.parent,
        )
        _, status, usage = os.wait4(proc.pid, 0)
        proc.returncode = os.waitstatus_to_exitcode(status)
    seconds = time.perf_counter() - t0
    text = peak_file.read_text().strip() if peak_file.exists() else ""
    peak_mb = int(text) / 1024.0 if text else usage.ru_maxrss / 1024.0  # fallback: an upper bound
    lines = [ln for ln in log.read_text(errors="replace").splitlines() if ln.strip()]
    last = lines[-1][-300:] if lines else ""
    return peak_mb, seconds, proc.returncode, last


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--size", type=int, default=20000, help="image edge in pixels")
    parser.add_argument("--workdir", type=Path, default=None, help="folder for the files")
    parser.add_argument("--keep", action="store_true", help="keep the generated files")
    parser.add_argument("--commands", default=",".join(COMMANDS), help="which commands to run")
    args = parser.parse_args()
    wanted = [c.strip() for c in args.commands.split(",") if c.strip()]
    unknown = set(wanted) - set(COMMANDS)
    if unknown:
        parser.error(f"--commands: unknown {', '.join(sorted(unknown))}; known: {', '.join(COMMANDS)}")

    if args.workdir is not None:
        args.workdir.mkdir(parents=True, exist_ok=True)
    base = Path(tempfile.mkdtemp(prefix="labeler-bigimage-", dir=args.workdir))
    out: dict = {"size": [args.size, args.size], "limit_mb": LIMIT_MB}
    failures: dict[str, str] = {}
    try:
        t0 = time.perf_counter()
        files = generate(base, args.size)
        out["generate_s"] = round(time.perf_counter() - t0, 1)
        out["image_file_mb"] = round(files["image"].stat().st_size / 2**20, 1)
        out["mask_file_mb"] = round(files["survey-a"].stat().st_size / 2**20, 1)
        project = base / "project"
        from labeler.states import SAVED_STATES, STATES

        states = ",".join(s for s in (*SAVED_STATES, "imported") if s in STATES)
        help_text = subprocess.run(
            [sys.executable, "-m", "labeler.cli", "import", "--help"], capture_output=True,
            text=True, env={**os.environ, "PYTHONPATH": str(ROOT)},
        ).stdout
        replace = ["--replace"] if "--replace" in help_text else []
        steps = [
            ("init", ["init", str(project)]),
            ("add", ["add", str(project), str(files["image"])]),
            ("propose", ["propose", str(project)]),
            ("import", ["import", str(project), str(files["survey-a"]), "--annotator", "survey-a"]),
            ("export_geojson", ["export", str(project), "--format", "geojson", "--states", states,
                                "--out", str(base / "export-geojson")]),
            ("export_masks", ["export", str(project), "--format", "masks", "--states", states,
                              "--out", str(base / "export-masks")]),
            ("import_b", ["import", str(project), str(files["survey-b"]), "--annotator",
                          "survey-b", *replace]),
            ("agreement", ["agreement", str(project), "--out", str(base / "agreement")]),
        ]
        needs = {
            "add": {"add"}, "propose": {"add", "propose"}, "import": {"add", "import"},
            "export_geojson": {"add", "import", "export_geojson"},
            "export_masks": {"add", "import", "export_masks"},
            "agreement": {"add", "import", "import_b", "agreement"},
        }
        todo = {"init"}.union(*(needs[c] for c in wanted))
        for name, cmd in steps:
            if name not in todo:
                continue
            mb, seconds, code, last = run(cmd, base / f"{name}.log")
            if name in COMMANDS:
                out[f"{name}_mb"] = round(mb, 1)
                out[f"{name}_s"] = round(seconds, 1)
            if code != 0:
                failures[name] = last
        if "add" in todo:
            from labeler.project import open_project
            from labeler.workflow import project_status

            with open_project(project) as opened:
                out["tiles"] = project_status(opened).tiles
    finally:
        if not args.keep:
            shutil.rmtree(base, ignore_errors=True)
        else:
            out["workdir"] = str(base)
    figures = [out[f"{c}_mb"] for c in COMMANDS if f"{c}_mb" in out]
    out["within_limit"] = bool(figures) and all(f <= LIMIT_MB for f in figures)
    out["failures"] = failures
    out["load_average_1min"] = round(os.getloadavg()[0], 2)
    print(json.dumps(out))


if __name__ == "__main__":
    main()
