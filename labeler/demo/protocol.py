"""A simulated annotator that corrects a tile in the editor by the interactive protocol.

It stands in for a person at the mask editor: it works only through the editor's own
operations (:class:`labeler.editor.state.EditorState`: ``active_class``, ``radius``,
``fill_at``, ``scribble``, ``refine``, ``box``, ``paint``, ``undo``, ``mask``) and never
writes a mask itself, so what it measures is the effort the editor asks of a person.

Where it acts
    As in the interactive segmentation protocol of Xu et al. (2016, "Deep Interactive
    Object Selection", CVPR) and its common reference implementations: at the interior
    point of the largest error region, with the target class there
    (:func:`labeler.demo.clicks.next_click`).

What it does there (the policy)
    The annotator foresees what each tool of ``ProtocolOptions.tools`` would do at the
    point, on copies of the editor's layers (a person who knows the tools foresees them),
    and uses first the one that raises the tile's IoU with the target most per action;
    a tool that would not raise it is not used:

    * **fill** (one action): the region the fill would take (the same-class region of the
      mask bounded by colour edges, :func:`labeler.masks.edits.region_at` on the tile
      image); considered only when at least ``fill_precision`` of it is the target class.
    * **scribble** + refine (two actions): a scribble of the target class through the
      interior point along the error region's long axis, kept inside the target class,
      then refine (:func:`labeler.masks.refine.refine_random_walker`, as the editor runs it).
    * **box** (one action): a box dragged around the error region (its bounding box
      grown by ``box_margin_px``), which the editor fills by GrabCut
      (:func:`labeler.masks.refine.grabcut_box`): how a person takes a whole missed weed
      or a whole wrongly classed plant in one gesture.
    * **brush** (one action): the best of a stroke along the error region's long axis
      (:func:`labeler.demo.clicks.stroke_line`) and one traced along its middle
      (:func:`labeler.demo.clicks.traced_line`, how a person fixes a thin sliver along a
      plant's edge), with the radius of the interior depth less half a pixel or one of
      :data:`labeler.demo.clicks.BRUSH_RADII` below it; the footprint never leaves the
      target class, so it always helps.

    An edit that does not raise the tile's IoU with the target after all (a re-fit on the
    tile, which cannot be foreseen) is taken back with undo (one more action), and the
    next tool is tried at the same point. The session stops when the IoU reaches
    ``target_iou`` (0.90) or after ``max_actions`` (20) counted editor actions.

Learning on the tile (``ProtocolOptions.relearn``, with a ``learner`` passed to
:func:`run_protocol`: the editor's :attr:`~labeler.editor.state.EditorState.learner`)
    * ``"off"``: never.
    * ``"scribble"``: every finished scribble re-fits the model on the tile's marks
      (``EditorState.relearn_on_scribble``); the scribble is tried first until two in a
      row did not help on that tile, then the foreseen order rules. The scribble alone
      is kept when it raised the IoU and the interior point now has the target class
      (one action); otherwise refine follows, and when neither helped both are taken back.
    * ``"key"``: after every kept step the annotator presses the relearn key (one
      action), taking it back with undo when it did not raise the IoU; after two such
      failures in a row the key is not pressed again on that tile.

Noise (:class:`AnnotatorHabits`)
    A person works towards the mask they see: the target is the truth changed by the
    annotator's habits, drawn once per session from a seeded generator: a systematic edge
    habit (``edge_bias_px``: plants drawn larger, or smaller, by whole pixels) and the
    errors of :class:`labeler.demo.annotator.AnnotatorProfile` (local boundary shifts,
    missed small weeds, weed/crop confusion on small plants, lesions missed or enlarged).
    Several annotators with their own generators then differ as people do.

IoU is :func:`labeler.demo.effort.tile_iou`: the per-class IoU averaged over the classes
present in the target.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
from scipy import ndimage as ndi

from labeler.classes import DEFAULT_SCHEMA, UNLABELLED, ClassSchema
from labeler.demo.annotator import AnnotatorProfile, simulate_annotation
from labeler.demo.clicks import (
    BRUSH_RADII,
    ErrorClick,
    footprint,
    next_click,
    stroke_line,
    traced_line,
)
from labeler.demo.effort import NOC_CAP, NOC_THRESHOLD, noc_at, tile_iou
from labeler.editor.state import EditorState
from labeler.masks.edits import region_at, region_bounds
from labeler.masks.refine import grabcut_box, refine_random_walker

__all__ = [
    "TOOLS",
    "RELEARN_MODES",
    "AnnotatorHabits",
    "ProtocolOptions",
    "ProtocolStep",
    "ProtocolRun",
    "run_protocol",
]

#: The tools the simulated annotator may use, in their default order.
TOOLS = ("fill", "box", "scribble", "brush")
#: When the model re-fits on the tile's marks (see the module notes).
RELEARN_MODES = ("off", "scribble", "key")
_SOIL = 0


@dataclass(frozen=True)
class AnnotatorHabits:
    """How one simulated annotator sees a tile (see the module notes).

    Attributes
    ----------
    profile : AnnotatorProfile or None
        Boundary shifts, missed small weeds, weed/crop confusion on small plants, lesion
        errors; ``None``: none of these.
    edge_bias_px : int
        Systematic edge habit: plants (every class but soil) grown into the soil by this
        many pixels (Euclidean), or shrunk when negative; -4..4.
    """

    profile: AnnotatorProfile | None = None
    edge_bias_px: int = 0

    def __post_init__(self) -> None:
        if int(self.edge_bias_px) != self.edge_bias_px or abs(self.edge_bias_px) > 4:
            raise ValueError(
                f"edge_bias_px: expected a whole number of pixels in -4..4, got "
                f"{self.edge_bias_px}"
            )

    def perceive(self, truth: np.ndarray, *, rng: np.random.Generator) -> np.ndarray:
        """The mask this annotator works towards on a tile of ``truth``.

        Parameters
        ----------
        truth : ndarray, shape (H, W), uint8
        rng : numpy.random.Generator
            Used only when ``profile`` is set.

        Returns
        -------
        target : ndarray, shape (H, W), uint8
            255 (unlabelled) wherever the truth holds it.
        """
        t = np.asarray(truth)
        out = t.copy() if self.profile is None else simulate_annotation(
            t, rng=rng, profile=self.profile
        )
        bias = int(self.edge_bias_px)
        labelled = t != UNLABELLED
        plant = (out != _SOIL) & labelled
        if bias > 0 and plant.any():
            dist, (ir, ic) = ndi.distance_transform_edt(~plant, return_indices=True)
            grow = labelled & ~plant & (dist <= bias)
            out[grow] = out[ir[grow], ic[grow]]
        elif bias < 0:
            soil = ~plant
            if soil.any():
                dist = ndi.distance_transform_edt(~soil)
                out[plant & (dist <= -bias)] = _SOIL
        out[~labelled] = UNLABELLED
        return out


@dataclass(frozen=True)
class ProtocolOptions:
    """The session's rules (see the module notes).

    Attributes
    ----------
    target_iou : float
        Stop at this IoU with the target (0.90).
    max_actions : int
        Stop after this many counted editor actions (20).
    tools : tuple of str
        Tools to try, in order, from :data:`TOOLS`.
    fill_precision : float
        Least share of the target class in the region a fill would take for the fill to
        be considered at all.
    scribble_radius_px : float
        Radius of a scribble stroke (at most the interior depth less half a pixel).
    stroke_length_px : float
        Longest stroke, along the error region's axis or traced along its middle.
    box_margin_px : int
        Pixels a box reaches beyond the error region's bounding box on every side.
    snap : bool
        Refine with superpixel snapping.
    relearn : {"off", "scribble", "key"}
        When the model re-fits on the tile's marks (see the module notes); anything but
        "off" needs a ``learner``.
    """

    target_iou: float = NOC_THRESHOLD
    max_actions: int = NOC_CAP
    tools: tuple[str, ...] = TOOLS
    fill_precision: float = 0.9
    scribble_radius_px: float = 1.5
    stroke_length_px: float = 48.0
    box_margin_px: int = 2
    snap: bool = False
    relearn: str = "off"

    def __post_init__(self) -> None:
        if self.relearn not in RELEARN_MODES:
            raise ValueError(
                f"relearn: expected one of {', '.join(RELEARN_MODES)}, got {self.relearn!r}"
            )
        if not 0.0 < self.target_iou <= 1.0:
            raise ValueError(f"target_iou: expected an IoU in (0, 1], got {self.target_iou}")
        if self.max_actions < 1:
            raise ValueError(f"max_actions: expected at least 1, got {self.max_actions}")
        bad = [t for t in self.tools if t not in TOOLS]
        if not self.tools or bad:
            raise ValueError(
                f"tools: expected one or more of {', '.join(TOOLS)}, got {self.tools!r}"
            )
        if not 0.0 < self.fill_precision <= 1.0:
            raise ValueError(
                f"fill_precision: expected a share in (0, 1], got {self.fill_precision}"
            )
        if self.scribble_radius_px < 0.5:
            raise ValueError(
                f"scribble_radius_px: expected at least 0.5, got {self.scribble_radius_px}"
            )
        if self.stroke_length_px < 0:
            raise ValueError(
                f"stroke_length_px: expected at least 0, got {self.stroke_length_px}"
            )
        if int(self.box_margin_px) != self.box_margin_px or self.box_margin_px < 0:
            raise ValueError(
                f"box_margin_px: expected a whole number of pixels, at least 0, got "
                f"{self.box_margin_px}"
            )


@dataclass(frozen=True)
class ProtocolStep:
    """One decision of the session: a tool used at a point.

    Attributes
    ----------
    tool : str
    point : (int, int)
    cls : int
    actions : int
        Editor actions it cost (undo included).
    kept : bool
        False when it was taken back with undo.
    """

    tool: str
    point: tuple[int, int]
    cls: int
    actions: int
    kept: bool


@dataclass(frozen=True)
class ProtocolRun:
    """The outcome of one simulated session on one tile.

    Attributes
    ----------
    mask : ndarray, shape (H, W), uint8
        The editor's mask at the end.
    target : ndarray, shape (H, W), uint8
        The mask the annotator worked towards (the truth seen through the habits).
    ious : tuple of float
        Tile IoU with the target after 0, 1, 2, ... counted editor actions.
    steps : tuple of ProtocolStep
    iou_truth : float
        Tile IoU of the final mask with the truth.
    """

    mask: np.ndarray = field(repr=False)
    target: np.ndarray = field(repr=False)
    ious: tuple[float, ...]
    steps: tuple[ProtocolStep, ...]
    iou_truth: float

    @property
    def actions(self) -> int:
        """Counted editor actions."""
        return len(self.ious) - 1

    def noc(self, *, threshold: float = NOC_THRESHOLD, cap: int = NOC_CAP) -> int:
        """Actions to reach ``threshold`` (:func:`labeler.demo.effort.noc_at`)."""
        return noc_at(self.ious, threshold=threshold, cap=cap)


class _Session:
    """The loop of one tile: the editor state, the target and the IoU trace."""

    def __init__(self, state: EditorState, target: np.ndarray, options: ProtocolOptions,
                 n_classes: int) -> None:
        self.state = state
        self.target = target
        self.options = options
        self.n_classes = n_classes
        self.ious = [self.iou()]
        self.steps: list[ProtocolStep] = []
        self.key_failures = 0
        self._brush_plan: tuple[float, list[tuple[float, float]], float] = (0.0, [], 0.5)
        self._box_plan: tuple[int, int, int, int] | None = None

    def iou(self) -> float:
        return tile_iou(self.target, self.state.mask, n_classes=self.n_classes)

    @property
    def budget(self) -> int:
        return self.options.max_actions - self.state.actions

    def note(self) -> None:
        """Record the IoU after each editor action counted since the last note."""
        value = self.iou()
        while len(self.ious) <= self.state.actions:
            self.ious.append(value)

    def done(self) -> bool:
        return self.ious[-1] >= self.options.target_iou or self.budget <= 0

    def undo_if_worse(self, before: float, changed: bool) -> bool:
        """Undo the last edit when it did not raise the IoU; True when it was kept."""
        if not changed:
            return False
        if self.ious[-1] > before:
            return True
        if self.budget > 0:
            self.state.undo()
            self.note()
        return False

    def act(self, click: ErrorClick) -> None:
        k = click.cls
        allowed = self.target == k
        self.state.active_class = k
        for tool in self._order(click, allowed):
            if self.budget <= 0:
                return
            first = self.state.actions
            before = self.ious[-1]
            kept = self._use(tool, click, allowed, before)
            if kept is None:
                continue  # the tool did not fit here; nothing was done
            if tool == "scribble" and self.options.relearn == "scribble":
                # like the key: after two scribbles in a row that did not help, the
                # annotator stops reaching for the scribble first on this tile
                self.key_failures = 0 if kept else self.key_failures + 1
            self.steps.append(
                ProtocolStep(tool, click.point, k, self.state.actions - first, kept)
            )
            if kept:
                self._press_relearn(click)
                return

    def _gain(self, changed: np.ndarray, cls: int) -> float:
        """IoU gained if the pixels of ``changed`` took class ``cls``."""
        if not changed.any():
            return 0.0
        mask = self.state.mask
        mask[changed] = cls
        return tile_iou(self.target, mask, n_classes=self.n_classes) - self.ious[-1]

    def _order(self, click: ErrorClick, allowed: np.ndarray) -> list[str]:
        """The tools to try at the click, the most IoU per action first (see the notes).

        Fill, box, brush and scribble + refine are foreseen on copies of the layers, as a
        person who knows the tools foresees what each does; a tool that would not raise
        the IoU is left out. With ``relearn="scribble"`` the scribble's re-fit cannot be
        foreseen, so the scribble comes first.
        """
        state, opts = self.state, self.options
        self._brush_plan = self._plan_brush(click, allowed)
        rates: dict[str, float] = {}
        for tool in opts.tools:
            if tool == "fill":
                region = region_at(state.mask, click.point, connectivity=state.connectivity,
                                   image=state.image).full(state.shape)
                if allowed[region].mean() >= opts.fill_precision:
                    rates[tool] = self._gain(region, click.cls)
            elif tool == "box":
                rates[tool] = self._plan_box(click)
            elif tool == "brush":
                rates[tool] = self._brush_plan[0]
            elif opts.relearn == "scribble" and self.key_failures < 2:
                rates[tool] = np.inf
            else:
                rates[tool] = self._scribble_gain(click, allowed) / 2.0
        return sorted((t for t in opts.tools if rates.get(t, 0.0) > 0.0),
                      key=lambda t: -rates[t])

    def _plan_brush(self, click: ErrorClick, allowed: np.ndarray):
        """The best brush stroke at the click: (IoU gain, points, radius).

        Candidates: a stroke along the error region's long axis (:func:`stroke_line`) and
        one traced along its middle (:func:`traced_line`), each with the radius of the
        interior depth less half a pixel and with the radii of :data:`BRUSH_RADII` up to
        it; every footprint stays inside the target class.
        """
        opts, shape = self.options, self.state.shape
        deepest = max(click.depth_px - 0.5, 0.5)
        radii = sorted({deepest, *(r for r in BRUSH_RADII if r < deepest)})
        best: tuple[float, list[tuple[float, float]], float] = (0.0, [], 0.5)
        for radius in radii:
            for line in (stroke_line, traced_line):
                points = line(allowed, click, radius=radius, length=opts.stroke_length_px)
                gain = self._gain(footprint(points, radius, shape), click.cls)
                if gain > best[0]:
                    best = (gain, points, radius)
        return best

    def _plan_box(self, click: ErrorClick) -> float:
        """The box around the click's error region, kept in ``_box_plan``; its IoU gain.

        The box is the region's bounding box grown by ``box_margin_px`` and clipped to the
        tile; it is not planned (gain 0) when it would cover the whole tile or be smaller
        than 2 x 2 pixels, as the editor refuses such boxes.
        """
        self._box_plan = None
        h, w = self.state.shape
        rs, cs = region_bounds(click.region, pad=int(self.options.box_margin_px))
        r0, r1, c0, c1 = rs.start, rs.stop, cs.start, cs.stop
        if r1 - r0 < 2 or c1 - c0 < 2 or (r0, c0, r1, c1) == (0, 0, h, w):
            return 0.0
        self._box_plan = (r0, c0, r1, c1)
        foreground = grabcut_box(self.state.image, self._box_plan)
        return self._gain(foreground, click.cls)

    def _scribble_points(self, click: ErrorClick, allowed: np.ndarray):
        radius = min(self.options.scribble_radius_px, max(click.depth_px - 0.5, 0.5))
        line = stroke_line(allowed, click, radius=radius,
                            length=self.options.stroke_length_px)
        return line, radius

    def _scribble_gain(self, click: ErrorClick, allowed: np.ndarray) -> float:
        """IoU gained by a scribble at the click followed by refine, foreseen."""
        state = self.state
        line, radius = self._scribble_points(click, allowed)
        weak = state.weak_label.copy()
        weak[footprint(line, radius, state.shape)] = click.cls
        refined = refine_random_walker(state.image, state.mask, weak, band_px=state.band_px,
                                       snap=self.options.snap)
        return tile_iou(self.target, refined, n_classes=self.n_classes) - self.ious[-1]

    def _press_relearn(self, click: ErrorClick) -> None:
        """The relearn key after a kept step (``relearn="key"``)."""
        if self.options.relearn != "key" or self.key_failures >= 2 or self.budget <= 0:
            return
        first = self.state.actions
        before = self.ious[-1]
        changed = self.state.relearn()
        self.note()
        kept = self.undo_if_worse(before, changed)
        self.key_failures = 0 if kept else self.key_failures + 1
        self.steps.append(
            ProtocolStep("relearn", click.point, click.cls, self.state.actions - first, kept)
        )

    def _use(
        self, tool: str, click: ErrorClick, allowed: np.ndarray, before: float
    ) -> bool | None:
        """Use one tool at the click: True kept, False taken back, None not used."""
        state, opts = self.state, self.options
        if tool == "fill":
            preview = region_at(
                state.mask, click.point, connectivity=state.connectivity, image=state.image
            ).full(state.shape)
            if allowed[preview].mean() < opts.fill_precision:
                return None
            changed = state.fill_at(click.point)
            self.note()
            return self.undo_if_worse(before, changed)
        if tool == "box":
            if self._box_plan is None:
                return None
            r0, c0, r1, c1 = self._box_plan
            changed = state.box(r0, c0, r1, c1)
            self.note()
            return self.undo_if_worse(before, changed)
        if tool == "scribble":
            if self.budget < 2:
                return None
            line, radius = self._scribble_points(click, allowed)
            state.radius = radius
            mask_before = state.mask
            state.scribble(line)
            self.note()
            relearned = not np.array_equal(state.mask, mask_before)
            if relearned and self.ious[-1] > before and state.mask[click.point] == click.cls:
                return True  # the re-fit on the new scribble fixed this error
            after_scribble = self.ious[-1]
            changed = state.refine(snap=opts.snap)
            self.note()
            kept = self.undo_if_worse(max(before, after_scribble), changed)
            if not kept and relearned and after_scribble <= before and self.budget > 0:
                state.undo()  # the scribble's re-fit made things worse too
                self.note()
            return kept or (relearned and after_scribble > before)
        _, points, radius = self._brush_plan
        if not points:
            return None
        state.radius = radius
        state.paint(points)
        self.note()
        return True


def run_protocol(
    image: np.ndarray,
    truth: np.ndarray,
    *,
    start: np.ndarray | None = None,
    habits: AnnotatorHabits | None = None,
    rng: np.random.Generator | None = None,
    options: ProtocolOptions | None = None,
    learner: Callable[[np.ndarray], np.ndarray | None] | None = None,
    schema: ClassSchema = DEFAULT_SCHEMA,
) -> ProtocolRun:
    """Correct one tile in the editor by the protocol (see the module notes).

    Parameters
    ----------
    image : ndarray, shape (H, W, 3), uint8
        The RGB tile.
    truth : ndarray, shape (H, W), uint8
        Exact classes of ``schema``; 255 pixels are never errors.
    start : ndarray, shape (H, W), uint8, optional
        The mask the editor opens with (the proposal); default an empty mask (all soil).
    habits : AnnotatorHabits, optional
        The annotator's noise; default none (the target is the truth).
    rng : numpy.random.Generator, optional
        Needed when ``habits`` has a profile.
    options : ProtocolOptions, optional
        Target IoU, action cap, tools; default the protocol's (0.90, 20, all tools).
    learner : callable, optional
        The editor's on-tile learner (marks (H, W) uint8 -> a new proposal (H, W) uint8),
        used as ``options.relearn`` says; needed unless that is ``"off"``.
    schema : ClassSchema
        Classes of the masks.

    Returns
    -------
    ProtocolRun
    """
    t = np.asarray(truth)
    if t.ndim != 2 or t.dtype != np.uint8:
        raise ValueError(
            f"truth: expected a 2-D uint8 class mask, got shape {t.shape} dtype {t.dtype}"
        )
    known = set(schema.indices) | {UNLABELLED}
    stray = sorted(set(np.unique(t).tolist()) - known)
    if stray:
        raise ValueError(
            f"truth: expected class indices {schema.indices} or 255, got also {stray}; "
            "pass the schema the truth was made with"
        )
    opts = ProtocolOptions() if options is None else options
    habits = AnnotatorHabits() if habits is None else habits
    if habits.profile is not None and not isinstance(rng, np.random.Generator):
        raise TypeError(
            f"rng: expected a numpy Generator for an annotator with a profile, got "
            f"{type(rng).__name__}; pass np.random.default_rng(seed)"
        )
    target = habits.perceive(t, rng=rng)
    proposal = np.zeros(t.shape, np.uint8) if start is None else np.asarray(start)
    if opts.relearn != "off" and learner is None:
        raise ValueError(
            f"learner: expected the on-tile learner for relearn={opts.relearn!r}, got None; "
            "pass learner= or set relearn='off'"
        )
    state = EditorState(image, proposal, schema=schema)
    if opts.relearn != "off":
        state.learner = learner
        state.relearn_on_scribble = opts.relearn == "scribble"
    session = _Session(state, target, opts, max(schema.indices) + 1)
    while not session.done():
        click = next_click(target, state.mask)
        if click is None:
            break
        spent = state.actions
        session.act(click)
        if state.actions == spent:
            break  # no listed tool fits the largest error: a person would stop here too
    return ProtocolRun(
        mask=state.mask,
        target=target,
        ious=tuple(session.ious),
        steps=tuple(session.steps),
        iou_truth=tile_iou(t, state.mask, n_classes=max(schema.indices) + 1),
    )
