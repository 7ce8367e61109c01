"""Latency of the mask editor's state: brush segment + render, refine, undo.

Builds a seeded field-like tile (soil texture, a row of crop plants, a few weeds) and its
proposal, then times on :class:`labeler.editor.state.EditorState`:

* ``brush_render_ms``: one brush segment (radius 6 px, ~10 px long) plus the render of a
  1024 x 1024 view, on a 256 x 256 tile shown at zoom 4 (target <= 16 ms, median);
* ``brush_render_tile1024_ms``: the same on a 1024 x 1024 tile at zoom 1;
* ``brush_window_frame_ms``: a brush segment plus the whole window image (view, status
  strip, text) as :class:`labeler.editor.session.EditorSession` draws it (no ``imshow``);
* ``refine_ms``: one random-walker refine on a 256 tile with a weak label of 5 scribble
  strokes (target <= 300 ms);
* ``undo_ms``: undo of one brush stroke (target <= 5 ms), and ``undo_render_ms`` with the
  following render;
* with ``--beside-retrain``: ``brush_window_frame_beside_retrain_ms`` (and its 90th
  percentile), the brush frame above timed over and over while another process retrains
  the demo plots' 12-tile project (``benchmarks/retrain_speed.py``) in the background as
  the terminal queue does (``labeler.workflow.background_work``: lowered priority, torch
  threads capped at the free cores less one), with ``brush_window_frame_ms`` of the same
  run beside it (target <= 16 ms while background work runs), ``background_retrain_s``
  and ``frames_beside_retrain``.

Prints one JSON line of medians (and 90th percentiles). The tile is synthetic: it measures
speed only, not segmentation quality.

Run: ``.venv/bin/python benchmarks/editor_latency.py [--beside-retrain]``
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from labeler.editor.backend import MemoryBackend  # noqa: E402
from labeler.editor.session import EditorSession  # noqa: E402
from labeler.editor.state import EditorState  # noqa: E402

REPEATS_BRUSH = 300
REPEATS_REFINE = 9
REPEATS_UNDO = 200
VIEW = (1024, 1024)
TARGETS_MS = {"brush_render_ms": 16.0, "refine_ms": 300.0, "undo_ms": 5.0}


def field_tile(size: int, *, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """A seeded soil tile with a row of crop plants and some weeds, and its proposal."""
    rng = np.random.default_rng(seed)
    r, c = np.indices((size, size))
    soil = np.array([112, 86, 62], np.float64)
    image = soil + rng.normal(0, 9, (size, size, 3))
    proposal = np.zeros((size, size), np.uint8)
    step = size / 5
    for k in range(5):  # crop row across the middle
        cr, cc = size / 2 + rng.normal(0, 4), step * (k + 0.5)
        rad = size * rng.uniform(0.05, 0.08)
        plant = (r - cr) ** 2 + (c - cc) ** 2 <= rad**2
        image[plant] = (58, 132, 48) + rng.normal(0, 10, (int(plant.sum()), 3))
        proposal[plant] = 1
    for _ in range(6):  # small weeds, half of them missed by the proposal
        wr, wc = rng.uniform(0, size, 2)
        rad = size * rng.uniform(0.015, 0.03)
        weed = (r - wr) ** 2 + (c - wc) ** 2 <= rad**2
        image[weed] = (96, 150, 40) + rng.normal(0, 10, (int(weed.sum()), 3))
        if rng.random() < 0.5:
            proposal[weed] = 2
    return np.clip(image, 0, 255).astype(np.uint8), proposal


def _stats(samples: list[float]) -> tuple[float, float]:
    a = np.asarray(samples) * 1000.0
    return round(float(np.median(a)), 3), round(float(np.percentile(a, 90)), 3)


def time_brush_render(size: int) -> tuple[float, float]:
    image, proposal = field_tile(size)
    state = EditorState(image, proposal, radius=6, active_class=2, view_shape=VIEW)
    state.render()  # builds the cached layers once, as opening the editor does
    zoom = state.transform.zoom
    rng = np.random.default_rng(1)
    samples = []
    point = np.array([size / 2, size / 2], np.float64)
    state.stroke_start(tuple(point))
    for i in range(REPEATS_BRUSH):
        step = rng.normal(0, 1, 2)
        point = np.clip(point + 10 * step / max(np.linalg.norm(step), 1e-9), 8, size - 8)
        view_pt = state.transform.tile_to_view(*point)
        t0 = time.perf_counter()
        state.stroke_to(tuple(point))
        state.hover((float(view_pt[0]), float(view_pt[1])))
        frame = state.render()
        samples.append(time.perf_counter() - t0)
        if i % 50 == 49:  # strokes of 50 segments, as a user lifts the button now and then
            state.stroke_end()
            state.stroke_start(tuple(point))
    state.stroke_end()
    assert frame.shape == (*VIEW, 3) and zoom == VIEW[0] / size
    return _stats(samples)


def brush_frames(repeats: int = REPEATS_BRUSH) -> list[float]:
    """Seconds of each brush segment plus the whole window image (view, status strip)."""
    image, proposal = field_tile(256)
    state = EditorState(image, proposal, radius=6, active_class=2, view_shape=VIEW)
    session = EditorSession(state, backend=MemoryBackend(), title="benchmark tile")
    session.frame()
    samples = []
    state.stroke_start((128.0, 20.0))
    for i in range(repeats):
        point = (128.0 + 40 * np.sin(i / 15), 20.0 + (i % 200))
        t0 = time.perf_counter()
        state.stroke_to(point)
        frame = session.frame()
        samples.append(time.perf_counter() - t0)
    state.stroke_end()
    assert frame.shape[1] == VIEW[1]
    return samples


def time_brush_frame() -> tuple[float, float]:
    """Median and 90th percentile of :func:`brush_frames`."""
    return _stats(brush_frames())


#: The background retrain's process: what the terminal queue's retrain key runs.
_BACKGROUND = """
import sys, time
from labeler.project import open_project
from labeler.workflow import background_work, retrain
project = open_project(sys.argv[1])
with background_work():
    print("started", flush=True)
    t0 = time.perf_counter()
    retrain(project)
    print(f"done {time.perf_counter() - t0:.2f}", flush=True)
"""


def time_frames_beside_retrain() -> dict[str, float | int]:
    """Brush frames timed while another process retrains the demo project in the background."""
    from benchmarks.retrain_speed import build_demo

    root = Path(__file__).resolve().parents[1]
    with tempfile.TemporaryDirectory(prefix="labeler-frames-") as tmp:
        project, _ = build_demo(Path(tmp) / "demo-12", 0)
        child = subprocess.Popen(
            [sys.executable, "-c", _BACKGROUND, str(project)],
            cwd=root,
            stdout=subprocess.PIPE,
            text=True,
        )
        assert child.stdout is not None
        first = child.stdout.readline().strip()  # the child says when its work begins
        if first != "started":
            child.kill()
            raise RuntimeError(f"background retrain did not start: {first!r}")
        samples: list[float] = []
        while child.poll() is None:
            samples += brush_frames(50)
        out = child.stdout.read().split()
        child.wait()
    if child.returncode != 0 or len(out) < 2 or out[0] != "done":
        raise RuntimeError(f"background retrain failed (exit {child.returncode}): {out!r}")
    median, p90 = _stats(samples)
    return {
        "brush_window_frame_beside_retrain_ms": median,
        "brush_window_frame_beside_retrain_p90_ms": p90,
        "frames_beside_retrain": len(samples),
        "background_retrain_s": float(out[1]),
    }


def time_refine() -> tuple[float, float]:
    image, proposal = field_tile(256)
    state = EditorState(image, proposal, radius=2, view_shape=VIEW)
    strokes = [  # five scribble strokes: three on plants and weeds, two on soil
        (1, [(128, 40), (128, 62)]),
        (1, [(122, 150), (134, 160)]),
        (2, [(40, 200), (46, 206)]),
        (0, [(70, 30), (70, 120)]),
        (0, [(200, 140), (215, 230)]),
    ]
    for cls, pts in strokes:
        state.active_class = cls
        state.scribble(pts)
    samples = []
    for _ in range(REPEATS_REFINE):
        t0 = time.perf_counter()
        state.refine()
        samples.append(time.perf_counter() - t0)
        state.undo()
    return _stats(samples)


def time_undo() -> tuple[tuple[float, float], tuple[float, float]]:
    image, proposal = field_tile(256)
    state = EditorState(image, proposal, radius=6, active_class=2, view_shape=VIEW)
    state.render()
    rng = np.random.default_rng(2)
    undo, undo_render = [], []
    for _ in range(REPEATS_UNDO):
        a = rng.uniform(20, 236, 2)
        b = np.clip(a + rng.normal(0, 30, 2), 0, 255)
        state.paint([tuple(a), tuple((a + b) / 2), tuple(b)])
        state.render()
        t0 = time.perf_counter()
        state.undo()
        t1 = time.perf_counter()
        state.render()
        t2 = time.perf_counter()
        undo.append(t1 - t0)
        undo_render.append(t2 - t0)
    return _stats(undo), _stats(undo_render)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument(
        "--beside-retrain",
        action="store_true",
        help="also time the brush frame while a background retrain runs (builds the demo project)",
    )
    args = ap.parse_args(argv)
    beside = time_frames_beside_retrain() if args.beside_retrain else {}
    brush, brush_p90 = time_brush_render(256)
    brush_big, brush_big_p90 = time_brush_render(1024)
    frame_ms, frame_p90 = time_brush_frame()
    refine, refine_p90 = time_refine()
    (undo, undo_p90), (undo_r, undo_r_p90) = time_undo()
    figures = {
        "brush_render_ms": brush,
        "brush_render_p90_ms": brush_p90,
        "brush_render_tile1024_ms": brush_big,
        "brush_render_tile1024_p90_ms": brush_big_p90,
        "brush_window_frame_ms": frame_ms,
        "brush_window_frame_p90_ms": frame_p90,
        "refine_ms": refine,
        "refine_p90_ms": refine_p90,
        "undo_ms": undo,
        "undo_p90_ms": undo_p90,
        "undo_render_ms": undo_r,
        "undo_render_p90_ms": undo_r_p90,
        "repeats": {"brush": REPEATS_BRUSH, "refine": REPEATS_REFINE, "undo": REPEATS_UNDO},
        "view": list(VIEW),
        "targets_ms": TARGETS_MS,
        "within_targets": bool(brush <= 16.0 and refine <= 300.0 and undo <= 5.0),
        **beside,
    }
    print(json.dumps(figures))
    return 0


if __name__ == "__main__":
    sys.exit(main())
