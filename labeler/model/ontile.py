"""Learning from an annotator's marks on one tile: the head's classifier re-fitted in place.

An annotator who corrects one weed on a tile should not have to correct its look-alikes on
the same tile. :class:`TileLearner` takes the tile's cached encoder features and the newest
head once, and then, for any set of marks (class indices where the annotator marked,
255 elsewhere), fits a small residual classifier on the tile alone and returns the tile's
new proposal:

* once per tile: the head's trunk features ``z`` (stride 4), bilinearly upsampled to the
  tile's pixels, and, for a refining head given the pixels (:mod:`labeler.model.refine`),
  the refinement's last hidden layer and the pixel input, all concatenated and scaled to
  unit standard deviation per channel: a per-pixel description ``f`` of D values; and the
  head's own per-pixel logits ``l0`` (exactly as :meth:`labeler.model.head.ProposalHead.refine`
  computes them for a refining head, bilinear otherwise);
* the fit: the new logits are ``l0 + g(f)`` with ``g`` a one-hidden-layer perceptron
  (``hidden`` ReLU units, output layer started at zero, so the fit starts at the head's own
  proposal). It minimises, with Adam (Kingma & Ba 2015) for ``steps`` full-batch steps,

      class-balanced cross-entropy over the marked pixels (at most ``max_marks``, evenly thinned)
      + prior_weight * mean over a regular grid of about PRIOR_SAMPLES pixels of KL(p_head || p_new)

  The cross-entropy weighs each marked class equally (a thin weed scribble counts as much
  as a long soil one); the Kullback-Leibler term keeps the head's own probabilities
  wherever nothing is marked, the distillation prior of "learning without forgetting"
  (Li & Hoiem 2017, IEEE TPAMI 40(12)). Because ``g`` is shared by every pixel, a mark on
  one weed moves every region whose features look like it: its look-alikes elsewhere on
  the tile change class with it.

Which pixels take the fit's class (the look-alike rule)
    A fit on a few marks over-generalises. Measured on the demo plots
    (``python -m benchmarks.ontile_rule``: 12 held-out tiles, a head trained on 10 % of
    the pool, corrections at the interior point of the largest error region): after five
    corrections the fitted mask taken whole lowered the tile IoU by 0.072 on average,
    where the corrections alone raised it by 0.017; most of its changes turned right crop
    into weed. So an unmarked pixel takes the fit's class ``k`` only where the fit is
    sure (its probability of ``k`` at least ``fit_sure``) and the pixel looks more like
    the pixels marked ``k`` than like anything else the tile shows: of the prototypes
    (mean unit-length description ``f``) of the pixels marked with each class and of the
    unmarked pixels the head gives each class with probability at least ``head_sure``,
    the nearest by cosine is the one of the marks of ``k``. Elsewhere it keeps the head's
    proposal; marked pixels take their marked class. With the rule the five corrections
    raised the IoU by 0.016 and ten by 0.030 (0.028 alone, 0.041 lost by the fit taken
    whole). On these plots, whose crop and weed share their colours, the fit cannot do
    much more: fitted to the truth at every 16th pixel of the tile it reaches a tile IoU
    of 0.77 on average (0.65 to 0.91) from the proposal's 0.67. On the peanut photos
    (``--dataset peanut``, a head on 19 tiles) the rule gained 0.063 after five
    corrections against 0.039 alone and 0.031 whole, but with another head of the same
    size it gained less than the corrections alone. A weed the head has never
    seen, unlike anything else on the tile, still changes with its marked look-alike
    (``tests/model/test_ontile.py``).

Each call fits afresh from the head's proposal with all the marks given (never from the
previous fit), so the result depends on the marks alone, not on the order of calls; the
hidden layer's start is drawn from ``seed``, so the fit is deterministic. The fit is a
few hundred small matrix products: it runs on one torch thread (several threads only add
hand-over costs at this size and stall on a busy machine) and takes well under a second
for a 256 x 256 tile on a laptop core.

Without marks, :meth:`TileLearner.fit` returns :meth:`TileLearner.proposal`, which is the
product's proposal of the tile (:func:`labeler.model.predict.propose_tiles` with one pass
and the tile's pixels): for a head without refinement the mean probabilities upsampled
with colour guidance. With marks, such a head's fit starts from its bilinear logits.

Masks are decision support: where they drive spraying or fungicide decisions, local
regulations and licensed agronomic advice come first.
"""

from __future__ import annotations

import contextlib
import math
from collections.abc import Iterator, Sequence
from dataclasses import dataclass

import numpy as np
import torch
import torch.nn.functional as F

from labeler.classes import UNLABELLED
from labeler.model.head import ProposalHead, class_lut, features_to_tensors
from labeler.model.predict import _argmax_first
from labeler.model.refine import pixel_input
from labeler.model.runtime import inference
from labeler.model.upsample import guided_upsample

__all__ = ["OnTileOptions", "TileLearner", "PRIOR_SAMPLES"]

#: About this many pixels (a regular grid) carry the prior term.
PRIOR_SAMPLES = 1024


def _refiner_features(head: ProposalHead, z: torch.Tensor, x: torch.Tensor,
                      shape: tuple[int, int]) -> torch.Tensor:
    """The refinement's last hidden layer (stride 2), upsampled to the tile, (1, c, H, W)."""
    r = head.refiner
    fine = F.relu(r.fine(x))
    coarse = F.relu(r.coarse(z))
    coarse = F.interpolate(coarse, size=fine.shape[-2:], mode="bilinear", align_corners=False)
    y = F.relu(r.fuse(torch.cat([fine, coarse], dim=1)))
    return F.interpolate(y, size=shape, mode="bilinear", align_corners=False)


@contextlib.contextmanager
def _one_thread() -> Iterator[None]:
    """Run torch on one intra-op thread inside the block, then restore the setting."""
    old = torch.get_num_threads()
    if old != 1:
        torch.set_num_threads(1)
    try:
        yield
    finally:
        if old != 1:
            torch.set_num_threads(old)


@dataclass(frozen=True)
class OnTileOptions:
    """How the classifier is re-fitted on one tile (see the module notes).

    Attributes
    ----------
    steps : int
        Full-batch Adam steps.
    lr : float
        Adam learning rate.
    prior_weight : float
        Weight of the KL term that keeps the head's probabilities where nothing is marked.
    hidden : int
        Hidden units of the residual perceptron.
    max_marks : int
        At most this many marked pixels enter the cross-entropy (an even thinning).
    seed : int
        Seed of the hidden layer's starting weights.
    head_sure : float
        Unmarked pixels whose head probability of a class is at least this make that
        class's prototype for the look-alike rule (see the module notes); in (0, 1].
    fit_sure : float
        An unmarked pixel takes the fit's class only where the fit gives that class at
        least this probability; in [0, 1).
    look_alike : bool
        Apply the look-alike rule; False takes the fit's class at every unmarked pixel
        (the fit whole, for comparison).
    """

    steps: int = 100
    lr: float = 0.01
    prior_weight: float = 1.0
    hidden: int = 32
    max_marks: int = 1024
    seed: int = 0
    head_sure: float = 0.7
    fit_sure: float = 0.9
    look_alike: bool = True

    def __post_init__(self) -> None:
        if int(self.steps) != self.steps or self.steps < 1:
            raise ValueError(f"steps: expected a whole number of at least 1, got {self.steps}")
        for name in ("hidden", "max_marks"):
            if int(getattr(self, name)) != getattr(self, name) or getattr(self, name) < 1:
                raise ValueError(
                    f"{name}: expected a whole number of at least 1, got {getattr(self, name)}"
                )
        for name in ("lr", "prior_weight"):
            value = getattr(self, name)
            if not (math.isfinite(value) and value >= 0):
                raise ValueError(f"{name}: expected a finite number >= 0, got {value}")
        if self.lr <= 0:
            raise ValueError(f"lr: expected a positive learning rate, got {self.lr}")
        if not 0.0 < self.head_sure <= 1.0:
            raise ValueError(
                f"head_sure: expected a probability in (0, 1], got {self.head_sure}; "
                "0.7 is the default"
            )
        if not 0.0 <= self.fit_sure < 1.0:
            raise ValueError(
                f"fit_sure: expected a probability in [0, 1), got {self.fit_sure}; "
                "0.9 is the default"
            )


class TileLearner:
    """One tile's proposals re-fitted from marks (see the module notes).

    Parameters
    ----------
    head : ProposalHead
        The newest trained head; it is not changed (a copy of its classifier is fitted).
    features : tuple of 4 ndarray
        The tile's encoder features at strides 4, 8, 16, 32, shapes ``(C_i, h_i, w_i)``
        (float16 from the feature cache or float32).
    image : ndarray, shape (H, W, 3), uint8, optional
        The tile's pixels: a refining head then proposes at full resolution, as
        :func:`labeler.model.predict.propose_tiles` does with ``images=``. Without them
        (or for a head without refinement) the logits are bilinearly upsampled.
    shape : (int, int), optional
        ``(H, W)`` of the tile when no ``image`` is given; default 4 x the stride-4 grid.
    options : OnTileOptions, optional

    Raises
    ------
    ValueError
        Features or pixels of the wrong shape (the message names which).
    """

    def __init__(
        self,
        head: ProposalHead,
        features: Sequence[np.ndarray],
        *,
        image: np.ndarray | None = None,
        shape: tuple[int, int] | None = None,
        options: OnTileOptions | None = None,
    ) -> None:
        self.options = options or OnTileOptions()
        self.class_indices = head.config.class_indices
        self._lut = class_lut(self.class_indices)
        levels = features_to_tensors([features])
        h4, w4 = levels[0].shape[-2:]
        if image is not None:
            im = np.asarray(image)
            if im.ndim != 3 or im.shape[2] != 3 or im.dtype != np.uint8:
                raise ValueError(
                    f"image: expected the tile's (H, W, 3) uint8 pixels, got shape {im.shape} "
                    f"dtype {im.dtype}"
                )
            shape = (int(im.shape[0]), int(im.shape[1]))
        elif shape is None:
            shape = (4 * int(h4), 4 * int(w4))
        if (math.ceil(shape[0] / 4), math.ceil(shape[1] / 4)) != (h4, w4):
            raise ValueError(
                f"image: the tile is {shape} but its stride-4 features are {h4} x {w4}; pass "
                "the pixels and features of the same tile"
            )
        self.shape = (int(shape[0]), int(shape[1]))
        head.eval()
        with _one_thread(), inference():
            z = head.trunk(levels)  # (1, C, h4, w4)
            base = head.classifier(z)
            logits = F.interpolate(base, size=self.shape, mode="bilinear", align_corners=False)
            parts = [F.interpolate(z, size=self.shape, mode="bilinear", align_corners=False)]
            if image is not None:
                x = pixel_input(np.asarray(image)[None])
                if head.refiner is not None:
                    logits = logits + head.refiner(z, x)
                    parts.append(_refiner_features(head, z, x, self.shape))
                parts.append(x)
            feats = torch.cat(parts, dim=1)[0]
            if image is not None and head.refiner is not None:
                first = logits
            else:  # as propose_tiles: the probabilities upsampled, with colour guidance if given
                probs = torch.softmax(base, dim=1)
                if image is None:
                    first = F.interpolate(probs, size=self.shape, mode="bilinear",
                                          align_corners=False)
                else:
                    guide = torch.from_numpy(np.asarray(image)[None]).permute(0, 3, 1, 2)
                    first = guided_upsample(probs, guide.to(torch.float32))
            self._first = self._mask_of(first[0])
        k = len(self.class_indices)
        d = feats.shape[0]
        # plain tensors (not inference tensors) so that autograd may use them
        self._feats = feats.reshape(d, -1).clone()  # (D, H * W)
        self._scale = self._feats.std(dim=1, keepdim=True).clamp_min(1e-6)
        self._feats = self._feats / self._scale
        self._logits0 = logits[0].reshape(k, -1).clone()  # (K, H * W)
        step = max(1, int(math.sqrt(self._feats.shape[1] / PRIOR_SAMPLES)))
        grid = np.arange(self._feats.shape[1]).reshape(self.shape)[::step, ::step].ravel()
        self._prior_at = torch.from_numpy(grid)
        with torch.no_grad():
            self._prior = F.log_softmax(self._logits0[:, self._prior_at].t(), dim=1)
            # for the look-alike rule: the head's top class and probability per pixel,
            # and the inverse length of each pixel's description
            self._head_top, self._head_arg = torch.softmax(self._logits0, dim=0).max(dim=0)
            self._inv_norm = 1.0 / self._feats.norm(dim=0).clamp_min(1e-6)  # (H * W,)
        self.refined = image is not None and head.refiner is not None

    # ------------------------------------------------------------------ proposals
    def _mask_of(self, logits: torch.Tensor) -> np.ndarray:
        arg = _argmax_first(logits.reshape(-1, *self.shape), dim=0).numpy()
        return np.asarray(self.class_indices, np.uint8)[arg]

    def proposal(self) -> np.ndarray:
        """The head's own proposal of the tile, ``(H, W)`` uint8 (no marks): the product's
        one-pass proposal (see the module notes)."""
        return self._first.copy()

    def _targets(self, marks: np.ndarray) -> tuple[torch.Tensor, torch.Tensor]:
        m = np.asarray(marks)
        if m.shape != self.shape or m.dtype != np.uint8:
            raise ValueError(
                f"marks: expected a uint8 array of the tile's shape {self.shape} (class index "
                f"where marked, 255 elsewhere), got shape {m.shape} dtype {m.dtype}"
            )
        channel = self._lut[m.ravel()]
        bad = sorted(set(m.ravel()[channel < 0].tolist()))
        if bad:
            raise ValueError(
                f"marks: expected the head's class indices {self.class_indices} or 255, got "
                f"also {bad}; mark with the classes the model was trained on"
            )
        where = np.flatnonzero(channel != UNLABELLED)
        return torch.from_numpy(where), torch.from_numpy(channel[where])

    def fit(self, marks: np.ndarray) -> np.ndarray:
        """The tile's proposal after fitting the residual classifier to ``marks``.

        Parameters
        ----------
        marks : ndarray, shape (H, W), uint8
            Class index where the annotator marked (scribbles, clicks, corrected pixels),
            255 elsewhere.

        Returns
        -------
        mask : ndarray, shape (H, W), uint8
            Schema class per pixel: the mark where marked; the fit's class where the
            look-alike rule lets it (see the module notes); :meth:`proposal` elsewhere and
            when nothing is marked.
        """
        where, target = self._targets(marks)
        if where.numel() == 0:
            return self.proposal()
        with _one_thread():
            probs = self._fit(where, target)  # (K, H * W)
        top, arg = probs.max(dim=0)
        if self.options.look_alike:
            take = (top >= self.options.fit_sure).numpy() & self._like_marks(where, target, arg)
        else:
            take = np.ones(arg.shape, bool)
        out = self._first.reshape(-1).copy()
        fitted = np.asarray(self.class_indices, np.uint8)[arg.numpy()]
        out[take] = fitted[take]
        m = np.asarray(marks).reshape(-1)
        marked = m != UNLABELLED
        out[marked] = m[marked]
        return out.reshape(self.shape)

    def _like_marks(self, where: torch.Tensor, target: torch.Tensor,
                    arg: torch.Tensor) -> np.ndarray:
        """Pixels nearer the prototype of the marks of their fitted class ``arg``
        (channel per pixel, (H * W,)) than any other prototype, (H * W,) bool (see the
        module notes)."""
        k = len(self.class_indices)
        feats, inv = self._feats, self._inv_norm  # (D, H * W), (H * W,)
        unmarked = torch.ones(feats.shape[1], dtype=torch.bool)
        unmarked[where] = False
        protos, of_marks = [], []
        for c in range(k):
            sel = where[target == c]
            if sel.numel():
                protos.append((feats[:, sel] * inv[sel]).mean(dim=1))
                of_marks.append(c)
            sure = unmarked & (self._head_arg == c) & (self._head_top >= self.options.head_sure)
            n = int(sure.sum())
            if n >= 5:  # the mean unit description as one product (no copy of the pixels)
                protos.append(feats @ (sure * inv) / n)
                of_marks.append(-1)
        p = torch.stack(protos)
        p = p / p.norm(dim=1, keepdim=True).clamp_min(1e-6)
        nearest = (p @ feats).argmax(dim=0)  # a pixel's norm does not change its nearest
        owner = torch.tensor(of_marks)[nearest]
        return (owner == arg).numpy()

    def _fit(self, where: torch.Tensor, target: torch.Tensor) -> torch.Tensor:
        """The fitted probabilities of every pixel, (K, H * W)."""
        opts = self.options
        k = len(self.class_indices)
        counts = torch.bincount(target, minlength=k).to(torch.float32)
        present = counts > 0
        class_w = torch.where(present, 1.0 / counts.clamp_min(1.0), torch.zeros(k))
        class_w = class_w / class_w[present].sum()  # each marked class weighs 1 / n_marked_classes
        d = self._feats.shape[0]
        if where.numel() > opts.max_marks:  # a fixed, even thinning of large corrections
            keep = torch.linspace(0, where.numel() - 1, opts.max_marks).round().long()
            where, target = where[keep], target[keep]
        at_marks = self._feats[:, where].t()  # (M, D)
        base_marks = self._logits0[:, where].t()  # (M, K)
        at_prior = self._feats[:, self._prior_at].t()
        base_prior = self._logits0[:, self._prior_at].t()
        generator = torch.Generator().manual_seed(opts.seed)
        hidden = torch.nn.Linear(d, opts.hidden)
        out = torch.nn.Linear(opts.hidden, k)
        with torch.no_grad():
            bound = 1.0 / math.sqrt(d)
            hidden.weight.uniform_(-bound, bound, generator=generator)
            hidden.bias.uniform_(-bound, bound, generator=generator)
            out.weight.zero_()  # the fit starts at the head's own proposal
            out.bias.zero_()
        net = torch.nn.Sequential(hidden, torch.nn.ReLU(), out)
        optimiser = torch.optim.Adam(net.parameters(), lr=opts.lr)
        prior_p = self._prior.exp()
        with torch.enable_grad():
            for _ in range(int(opts.steps)):
                optimiser.zero_grad()
                ce = F.cross_entropy(base_marks + net(at_marks), target, reduction="none")
                loss = (ce * class_w[target]).sum()
                if opts.prior_weight > 0:
                    log_new = F.log_softmax(base_prior + net(at_prior), dim=1)
                    kl = (prior_p * (self._prior - log_new)).sum(dim=1).mean()
                    loss = loss + opts.prior_weight * kl
                loss.backward()
                optimiser.step()
        with torch.no_grad():
            return torch.softmax(self._logits0 + net(self._feats.t()).t(), dim=0)
