"""Crop rows on a vegetation mask: direction, spacing, centre lines and row bands.

Geometry (row/column order throughout). A row direction at angle ``theta`` runs along
``d = (-sin theta, cos theta)`` in (row, col) units and has the normal
``n = (cos theta, sin theta)``: ``theta = 0`` gives horizontal rows (constant image row),
``theta = 90`` vertical rows; angles lie in [0, 180). A pixel centre ``(r, c)`` has the
across-row coordinate ``t = r cos theta + c sin theta`` and the along-row coordinate
``s = -r sin theta + c cos theta``. Row ``k`` is the curve
``t = offset_k + a1 * x + a2 * x**2`` with ``x = (s - s_mid) / s_scale``: all rows share
one gentle bow (a drill follows one path), each has its own offset.

Method. The direction maximises the contrast of the projection profile: the histogram of
``t`` over vegetation pixels against the histogram expected if the same pixels were
spread evenly over the image (a Radon-style angle search, coarse then fine). Along the
best direction, the spacing is the first strong peak of the profile's autocorrelation
(at most 0.4 of the image extent, so at least two and a half rows must show), the phase
is the best fit of a comb of that spacing, each row's offset is refined by a local
centroid of the vegetation share (rows cut by the image edge keep the comb position),
the shared bow is fitted by weighted least squares to (row, segment) centroids along the
rows, and the band half-width is read off the mean cross-row profile where it falls to
``band_level`` of its height above the between-row floor. Gaps in rows only lower the
profile; weeds between rows raise the floor. On sharp-edged bands the estimated
half-width comes out up to about a pixel wider than the band.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import ndimage

__all__ = ["RowPattern", "detect_rows", "projection_contrast"]

#: Pixels per chunk where a histogram over the whole mask is built piece by piece.
_CHUNK = 1 << 20


@dataclass(frozen=True)
class RowPattern:
    """Crop rows found on an image, in that image's pixel frame.

    Attributes
    ----------
    angle_deg : float
        Row direction in degrees, [0, 180) (see the module docstring).
    spacing_px : float
        Distance between neighbouring row centre lines, across the rows.
    half_width_px : float
        Half the width of the band around each centre line that holds the crop.
    offsets : tuple of float
        Across-row coordinate ``t`` of each row at ``s = s_mid``, increasing.
    bow : (float, float)
        Shared curve coefficients ``(a1, a2)`` in pixels.
    s_mid, s_scale : float
        Centre and half-length of the along-row coordinate over the image.
    periodicity : float
        Autocorrelation of the cross-row profile at one spacing, or the smaller of those
        at one and two spacings where two fit in the image; at most 1 (perfect rows).
    shape : (int, int)
        ``(height, width)`` of the image the rows were found on.
    """

    angle_deg: float
    spacing_px: float
    half_width_px: float
    offsets: tuple[float, ...]
    bow: tuple[float, float]
    s_mid: float
    s_scale: float
    periodicity: float
    shape: tuple[int, int]

    # -- coordinates ------------------------------------------------------------------
    def across_along(self, rows: np.ndarray, cols: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Across-row ``t`` (bow removed) and along-row ``s`` of pixel centres.

        Parameters
        ----------
        rows, cols : ndarray
            Pixel coordinates in the frame of :attr:`shape` (broadcastable).

        Returns
        -------
        u, s : ndarray
            ``u = t - bow(s)``: a row centre line is ``u = offset_k``.
        """
        th = math.radians(self.angle_deg)
        r = np.asarray(rows, np.float64)
        c = np.asarray(cols, np.float64)
        t = r * math.cos(th) + c * math.sin(th)
        s = -r * math.sin(th) + c * math.cos(th)
        x = (s - self.s_mid) / self.s_scale
        return t - (self.bow[0] * x + self.bow[1] * x * x), s

    def _grid(self, shape: tuple[int, int], origin: tuple[int, int]):
        h, w = _check_shape(shape)
        r0, c0 = int(origin[0]), int(origin[1])
        rows = np.arange(r0, r0 + h, dtype=np.float64)[:, None]
        cols = np.arange(c0, c0 + w, dtype=np.float64)[None, :]
        return self.across_along(rows, cols)

    def distance(
        self, shape: tuple[int, int] | None = None, *, origin: tuple[int, int] = (0, 0)
    ) -> np.ndarray:
        """Across-row distance of each pixel to the nearest row centre line.

        Parameters
        ----------
        shape : (int, int), optional
            Size of the window; default the whole image (:attr:`shape`).
        origin : (int, int)
            Top-left pixel ``(row, col)`` of the window in the image (a tile's
            ``(window.row, window.col)``).

        Returns
        -------
        distance : ndarray, shape ``shape``, float64, >= 0
            ``inf`` everywhere when there are no rows.
        """
        shape = self.shape if shape is None else shape
        u, _ = self._grid(shape, origin)
        if not self.offsets:
            return np.full(u.shape, np.inf)
        offs = np.asarray(self.offsets, np.float64)
        k = np.clip(np.searchsorted(offs, u), 1, max(1, offs.size - 1))
        if offs.size == 1:
            return np.abs(u - offs[0])
        return np.minimum(np.abs(u - offs[k - 1]), np.abs(u - offs[k]))

    def band_mask(
        self,
        shape: tuple[int, int] | None = None,
        *,
        origin: tuple[int, int] = (0, 0),
        half_width_px: float | None = None,
    ) -> np.ndarray:
        """Pixels within the row bands (``distance <= half_width_px``).

        Parameters
        ----------
        shape, origin
            As in :meth:`distance`: compute the bands of one tile window of the image.
        half_width_px : float, optional
            Override of :attr:`half_width_px`.

        Returns
        -------
        band : ndarray, shape ``shape``, bool
        """
        hw = self.half_width_px if half_width_px is None else float(half_width_px)
        if hw < 0:
            raise ValueError(f"half_width_px: expected a width >= 0, got {hw}")
        return self.distance(shape, origin=origin) <= hw

    def centre_lines(
        self,
        shape: tuple[int, int] | None = None,
        *,
        origin: tuple[int, int] = (0, 0),
        step_px: float = 4.0,
    ) -> list[np.ndarray]:
        """Points along each row centre line that fall inside the window.

        Returns
        -------
        lines : list of ndarray, each shape (N, 2), float64
            ``(row, col)`` positions relative to ``origin``, in along-row order; rows
            that miss the window are left out.
        """
        h, w = _check_shape(self.shape if shape is None else shape)
        if step_px <= 0:
            raise ValueError(f"step_px: expected a positive step, got {step_px}")
        th = math.radians(self.angle_deg)
        ct, st = math.cos(th), math.sin(th)
        r0, c0 = origin
        corners = np.array([[r0, c0], [r0, c0 + w], [r0 + h, c0], [r0 + h, c0 + w]], float)
        s_c = -corners[:, 0] * st + corners[:, 1] * ct
        s = np.arange(s_c.min() - step_px, s_c.max() + step_px, step_px)
        x = (s - self.s_mid) / self.s_scale
        bow = self.bow[0] * x + self.bow[1] * x * x
        lines = []
        for off in self.offsets:
            t = off + bow
            rr = t * ct - s * st - r0
            cc = t * st + s * ct - c0
            keep = (rr >= -0.5) & (rr <= h - 0.5) & (cc >= -0.5) & (cc <= w - 0.5)
            if keep.any():
                lines.append(np.stack([rr[keep], cc[keep]], axis=1))
        return lines


def _wrap_angle(angle: float) -> float:
    a = float(angle) % 180.0
    return 0.0 if a >= 180.0 - 1e-9 else a


def _check_shape(shape) -> tuple[int, int]:
    if len(shape) != 2 or int(shape[0]) < 1 or int(shape[1]) < 1:
        raise ValueError(f"shape: expected (height, width) of at least one pixel, got {shape!r}")
    return int(shape[0]), int(shape[1])


def _as_mask(vegetation: np.ndarray) -> np.ndarray:
    m = np.asarray(vegetation)
    if m.ndim != 2:
        raise ValueError(
            f"vegetation: expected a 2-D mask of shape (H, W), got shape {m.shape}"
        )
    if m.dtype != bool:
        raise ValueError(
            f"vegetation: expected a boolean mask, got dtype {m.dtype}; pass e.g. `mask > 0`"
        )
    return m


def _block_mean(mask: np.ndarray, factor: int):
    """Block means of ``mask`` and the centre coordinates of the blocks."""
    h, w = mask.shape
    hb, wb = h // factor, w // factor
    if factor == 1 or hb == 0 or wb == 0:
        r, c = np.indices(mask.shape, dtype=np.float64)
        return mask.astype(np.float64).ravel(), r.ravel(), c.ravel()
    m = mask[: hb * factor, : wb * factor].astype(np.float64)
    means = m.reshape(hb, factor, wb, factor).mean(axis=(1, 3))
    r, c = np.indices((hb, wb), dtype=np.float64)
    centre = (factor - 1) / 2.0
    return means.ravel(), (r * factor + centre).ravel(), (c * factor + centre).ravel()


def _profile(weights, rows, cols, theta_deg: float, bin_px: float):
    """Vegetation and all-pixel histograms of ``t`` at one angle; returns (h, n, t0)."""
    th = math.radians(theta_deg)
    t = rows * math.cos(th) + cols * math.sin(th)
    t0 = t.min()
    idx = ((t - t0) / bin_px).astype(np.int64)
    n = np.bincount(idx).astype(np.float64)
    h = np.bincount(idx, weights=weights, minlength=n.size)
    return h, n, t0


def projection_contrast(vegetation: np.ndarray, angle_deg: float, *, bin_px: float = 2.0) -> float:
    """Contrast of the cross-row profile at one candidate row angle.

    ``sum((h - e)**2) / sum(e**2)``, where ``h`` counts vegetation pixels per bin of the
    across-row coordinate and ``e`` is the count expected for evenly spread vegetation.
    0 for a uniform mask; larger when the angle lines up with rows.

    Parameters
    ----------
    vegetation : ndarray, shape (H, W), bool
    angle_deg : float
        Candidate row angle (module convention).
    bin_px : float
        Bin width along the normal.

    Returns
    -------
    contrast : float
        0 for an empty or full mask.
    """
    m = _as_mask(vegetation)
    if bin_px <= 0:
        raise ValueError(f"bin_px: expected a positive bin width, got {bin_px}")
    wts, rows, cols = _block_mean(m, 1)
    return _contrast(wts, rows, cols, angle_deg, bin_px)


def _contrast(wts, rows, cols, angle_deg, bin_px) -> float:
    h, n, _ = _profile(wts, rows, cols, angle_deg, bin_px)
    total = wts.sum()
    if total <= 0 or total >= n.sum():
        return 0.0
    e = n * (total / n.sum())
    return float(np.sum((h - e) ** 2) / np.sum(e * e))


def _autocorr(x: np.ndarray, valid: np.ndarray) -> np.ndarray:
    """Normalised autocorrelation of ``x`` over ``valid`` samples, lags 0..len-1."""
    xv = np.where(valid, x - x[valid].mean(), 0.0)
    vv = valid.astype(np.float64)
    n = xv.size
    size = 1 << int(math.ceil(math.log2(2 * n)))
    fx = np.fft.rfft(xv, size)
    fv = np.fft.rfft(vv, size)
    num = np.fft.irfft(fx * np.conj(fx), size)[:n]
    cnt = np.fft.irfft(fv * np.conj(fv), size)[:n]
    cnt = np.rint(cnt)
    with np.errstate(invalid="ignore", divide="ignore"):
        ac = np.where(cnt > 0, num / np.maximum(cnt, 1), 0.0)
    return ac / ac[0] if ac[0] > 0 else np.zeros(n)


def detect_rows(
    vegetation: np.ndarray,
    *,
    min_spacing_px: float = 16.0,
    max_spacing_px: float | None = None,
    half_width_px: float | None = None,
    band_level: float = 0.12,
    min_periodicity: float = 0.3,
    fit_bow: bool = True,
) -> RowPattern | None:
    """Find crop rows on a vegetation mask.

    Parameters
    ----------
    vegetation : ndarray, shape (H, W), bool
        Plant pixels of a whole image (a single tile may be too small to show rows).
    min_spacing_px, max_spacing_px : float
        Range of row spacings to consider; ``max_spacing_px`` defaults to 0.4 times the
        image extent across the rows.
    half_width_px : float, optional
        Band half-width; default: estimated from the data (see ``band_level``).
    band_level : float
        Fraction of the cross-row profile's height above the between-row floor at which
        the band ends, 0 < level < 1 (smaller gives wider bands).
    min_periodicity : float
        Rows are reported only when :attr:`RowPattern.periodicity` reaches this value.
        The default 0.3 rejects salt noise; random clumps of plants on a small window
        can still reach 0.5, so detect rows on whole images.
    fit_bow : bool
        Fit the shared gentle curve of the rows (False: straight rows).

    Returns
    -------
    RowPattern or None
        None when the mask is empty or full, or shows no row pattern in the spacing range.
    """
    m = _as_mask(vegetation)
    if min_spacing_px <= 0:
        raise ValueError(f"min_spacing_px: expected a positive spacing, got {min_spacing_px}")
    if max_spacing_px is not None and max_spacing_px <= min_spacing_px:
        raise ValueError(
            f"max_spacing_px: expected more than min_spacing_px ({min_spacing_px}), "
            f"got {max_spacing_px}"
        )
    if not 0.0 < band_level < 1.0:
        raise ValueError(f"band_level: expected a fraction in (0, 1), got {band_level}")
    if half_width_px is not None and half_width_px < 0:
        raise ValueError(f"half_width_px: expected a width >= 0, got {half_width_px}")
    h, w = m.shape
    count = int(m.sum())
    if count == 0 or count == m.size or min(h, w) < 8:
        return None

    # 1. direction: coarse search on block means, then finer steps
    factor = max(1, int(round(min(h, w) / 192.0)))
    wts, rows, cols = _block_mean(m, factor)
    coarse_bin = max(1.0, min(float(factor), min_spacing_px / 4.0))
    angles = np.arange(0.0, 180.0, 1.0)
    scores = np.array([_contrast(wts, rows, cols, a, coarse_bin) for a in angles])
    best = float(angles[int(np.argmax(scores))])
    f2 = max(1, factor // 2)
    wts2, rows2, cols2 = _block_mean(m, f2)
    fine_bin = max(1.0, min(float(f2), min_spacing_px / 4.0))
    for span, step in ((1.5, 0.25), (0.3, 0.05)):
        cand = best + np.arange(-span, span + step / 2, step)
        sc = [_contrast(wts2, rows2, cols2, a % 180.0, fine_bin) for a in cand]
        best = float(cand[int(np.argmax(sc))]) % 180.0
    theta = _wrap_angle(best)

    # 2. cross-row profile at 1 px bins on the full mask
    rr = np.arange(h, dtype=np.float64)[:, None]  # broadcast: no (H, W) index arrays
    cc = np.arange(w, dtype=np.float64)[None, :]
    th = math.radians(theta)
    ct, st = math.cos(th), math.sin(th)
    t = rr * ct + cc * st
    s = -rr * st + cc * ct
    s_lo, s_hi = float(s.min()), float(s.max())
    s_mid, s_scale = (s_lo + s_hi) / 2.0, max((s_hi - s_lo) / 2.0, 1.0)
    t_lo = float(t.min())
    spacing, t0, periodicity, density, valid = _spacing_phase(
        m, t, t_lo, min_spacing_px, max_spacing_px
    )
    if spacing is None or periodicity < min_periodicity:
        return None

    # 3. rows of the comb inside (or just beside) the image
    t_hi = float(t.max())
    ks = np.arange(math.floor((t_lo - t0) / spacing) - 1, math.ceil((t_hi - t0) / spacing) + 2)
    centres = t0 + ks * spacing
    veg_t = t[m]
    veg_s = s[m]
    bow = (0.0, 0.0)
    offsets = _refine_offsets(centres, t, m, spacing)
    if fit_bow:
        for _ in range(2):
            bow = _fit_bow(veg_t, veg_s, offsets, bow, spacing, s_mid, s_scale)
            offsets = _refine_offsets(offsets, t - _bow_at(s, bow, s_mid, s_scale), m, spacing)

    # 4. band half-width from the mean cross-row profile
    u_all = t - _bow_at(s, bow, s_mid, s_scale)
    del t, s, veg_t, veg_s  # a few bytes per pixel less while the band is measured
    if half_width_px is None:
        half_width_px = _band_half_width(m, u_all, offsets, spacing, band_level)
    margin = half_width_px + 1.0
    u_lo, u_hi = float(u_all.min()), float(u_all.max())
    offsets = offsets[(offsets >= u_lo - margin) & (offsets <= u_hi + margin)]
    return RowPattern(
        angle_deg=float(theta),
        spacing_px=float(spacing),
        half_width_px=float(half_width_px),
        offsets=tuple(float(o) for o in np.sort(offsets)),
        bow=(float(bow[0]), float(bow[1])),
        s_mid=float(s_mid),
        s_scale=float(s_scale),
        periodicity=float(periodicity),
        shape=(h, w),
    )


def _spacing_phase(m, t, t_lo, min_spacing, max_spacing):
    """Row spacing (autocorrelation), comb phase and periodicity of the profile."""
    idx = np.floor(t - t_lo + 0.5).astype(np.int64).ravel()  # bin k holds t_lo + k
    n = np.bincount(idx).astype(np.float64)
    hv = np.bincount(idx, weights=m.ravel().astype(np.float64), minlength=n.size)
    valid = n >= 0.25 * np.median(n[n > 0])
    density = np.where(valid, hv / np.maximum(n, 1), 0.0)
    length = int(valid.sum())
    hi = 0.4 * length if max_spacing is None else float(max_spacing)
    lo = float(min_spacing)
    if hi <= lo or length < 2 * lo:
        return None, 0.0, 0.0, density, valid
    smooth = ndimage.gaussian_filter1d(density, max(0.5, lo / 8.0), mode="nearest")
    ac = _autocorr(smooth, valid)
    lags = np.arange(ac.size)
    inrange = (lags >= lo) & (lags <= min(hi, ac.size - 2))
    if not inrange.any():
        return None, 0.0, 0.0, density, valid
    peaks = np.flatnonzero(
        inrange[1:-1] & (ac[1:-1] >= ac[:-2]) & (ac[1:-1] > ac[2:])
    ) + 1
    if peaks.size == 0:
        return None, 0.0, 0.0, density, valid
    top = ac[peaks].max()
    if top <= 0:
        return None, float(top), 0.0, density, valid
    first = peaks[ac[peaks] >= 0.6 * top][0]
    # parabolic sub-pixel peak
    y0, y1, y2 = ac[first - 1], ac[first], ac[first + 1]
    denom = y0 - 2 * y1 + y2
    shift = 0.5 * (y0 - y2) / denom if denom != 0 else 0.0
    spacing = float(first + np.clip(shift, -0.5, 0.5))
    periodicity = float(min(1.0, y1))
    # refine the spacing from the positions of the later autocorrelation peaks
    # (rows repeat: where two spacings fit in the profile, the periodicity is the smaller
    # of the autocorrelations at one and at two spacings, which random clumps rarely share)
    multiples = [spacing]
    for j in range(2, 6):
        target = j * spacing
        a, b = int(target - spacing / 4), int(target + spacing / 4) + 1
        if b >= ac.size - 1 or b > valid.sum() * 0.75:
            break
        k = a + int(np.argmax(ac[a:b]))
        if j == 2:
            periodicity = min(periodicity, float(ac[k]))
        if ac[k] < 0.5 * periodicity:
            break
        multiples.append(k / j)
    spacing = float(np.mean(multiples)) if len(multiples) > 1 else spacing
    # phase: comb of the spacing that collects the most density
    # (a matched smoothing of a sixth of a spacing makes flat-topped rows peak mid-row)
    comb = ndimage.gaussian_filter1d(np.where(valid, density, 0.0), spacing / 6.0)
    weight = ndimage.gaussian_filter1d(valid.astype(np.float64), spacing / 6.0)
    comb = np.where(weight > 0.5, comb / np.maximum(weight, 1e-9), 0.0)
    grid = np.arange(comb.size, dtype=np.float64)
    best_phase, best_sum = 0.0, -np.inf
    for phase in np.arange(0.0, spacing, 0.25):
        pos = np.arange(phase, comb.size, spacing)
        inside = np.interp(pos, grid, weight) > 0.5
        if not inside.any():
            continue
        total = np.interp(pos[inside], grid, comb).mean()
        if total > best_sum:
            best_phase, best_sum = float(phase), total
    return spacing, t_lo + best_phase, periodicity, density, valid


def _refine_offsets(
    centres: np.ndarray, u_all: np.ndarray, m: np.ndarray, spacing: float
) -> np.ndarray:
    """Move each row offset to the centroid of the vegetation density within a third of a
    spacing. Density (vegetation share per 1 px bin of ``u``) rather than counts, so a row
    cut by the image edge is not pulled inwards."""
    u = u_all.ravel()
    lo = math.floor(float(u.min()))
    idx = np.floor(u - lo + 0.5).astype(np.int64)  # bin k holds lo + k
    n = np.bincount(idx).astype(np.float64)
    hv = np.bincount(idx, weights=m.ravel().astype(np.float64), minlength=n.size)
    valid = n >= 0.1 * np.median(n[n > 0])
    dens = np.where(valid, hv / np.maximum(n, 1), 0.0)
    pos = lo + np.arange(n.size, dtype=np.float64)
    out = np.asarray(centres, np.float64).copy()
    for k, start in enumerate(out):
        c = float(start)
        for _ in range(3):
            near = np.abs(pos - c) <= spacing / 3.0
            window = 2 * int(spacing / 3.0)
            if int((near & valid).sum()) < window:
                break  # a row cut by the image edge keeps its comb position
            sel = near & valid
            mass = dens[sel].sum()
            if mass <= 0:
                break
            c = float(np.clip((pos[sel] * dens[sel]).sum() / mass,
                              start - spacing / 4, start + spacing / 4))
        out[k] = c
    return out


def _bow_at(s, bow, s_mid, s_scale):
    x = (np.asarray(s, np.float64) - s_mid) / s_scale
    return bow[0] * x + bow[1] * x * x


def _fit_bow(veg_t, veg_s, offsets, bow, spacing, s_mid, s_scale):
    """Weighted least-squares fit of the shared curve to row centroids in segments."""
    u = veg_t - _bow_at(veg_s, bow, s_mid, s_scale)
    offs = np.sort(offsets)
    k = np.clip(np.searchsorted(offs, u), 1, max(1, offs.size - 1))
    if offs.size == 1:
        nearest = np.zeros(u.size, np.int64)
    else:
        left = np.abs(u - offs[k - 1]) <= np.abs(u - offs[k])
        nearest = np.where(left, k - 1, k)
    resid = u - offs[nearest]
    close = np.abs(resid) <= spacing / 3.0
    n_seg = int(np.clip((2 * s_scale) // max(spacing, 1.0), 3, 12))
    edges = np.linspace(s_mid - s_scale, s_mid + s_scale, n_seg + 1)
    seg = np.clip(np.searchsorted(edges, veg_s, side="right") - 1, 0, n_seg - 1)
    # one centroid per (row, segment); pieces cut by the image edge hold fewer pixels
    # and are left out, so they cannot pull the curve
    key = (nearest * n_seg + seg)[close]
    cnt = np.bincount(key, minlength=offs.size * n_seg).astype(np.float64)
    tot = np.bincount(key, weights=resid[close], minlength=offs.size * n_seg)
    used = cnt >= max(30.0, 0.7 * float(np.median(cnt[cnt > 0]))) if (cnt > 0).any() else cnt > 0
    groups = np.flatnonzero(used)
    seg_of = groups % n_seg
    xs = ((edges[seg_of] + edges[seg_of + 1]) / 2 - s_mid) / s_scale
    ys = tot[groups] / cnt[groups]
    ws = np.sqrt(cnt[groups])
    if np.unique(seg_of).size < 3:
        return bow
    x = np.asarray(xs)
    y = np.asarray(ys)
    wt = np.asarray(ws)
    design = np.stack([x, x * x, np.ones_like(x)], axis=1) * wt[:, None]
    coef, *_ = np.linalg.lstsq(design, y * wt, rcond=None)
    limit = spacing / 3.0  # a bow of more than a third of a spacing is not a gentle curve
    a1 = float(np.clip(bow[0] + coef[0], -limit, limit))
    a2 = float(np.clip(bow[1] + coef[1], -limit, limit))
    return (a1, a2)


def _band_half_width(m, u_all, offsets, spacing, level):
    """Half-width where the mean cross-row profile falls to ``level`` above its floor."""
    offs = np.sort(offsets)
    half = spacing / 2.0
    u_flat, m_flat = u_all.ravel(), m.ravel()
    n = np.zeros(int(half + 0.5) + 1, np.float64)
    hv = np.zeros_like(n)
    for a in range(0, u_flat.size, _CHUNK):  # in chunks: bounded temporaries
        u = u_flat[a : a + _CHUNK]
        k = np.clip(np.searchsorted(offs, u), 1, max(1, offs.size - 1))
        if offs.size == 1:
            d = np.abs(u - offs[0])
        else:
            d = np.minimum(np.abs(u - offs[k - 1]), np.abs(u - offs[k]))
        keep = d <= half
        idx = np.floor(d[keep] + 0.5).astype(np.int64)  # bin j holds distance j
        n += np.bincount(idx, minlength=n.size)  # counts and 0/1 weights: exact sums
        hv += np.bincount(idx, weights=m_flat[a : a + _CHUNK][keep], minlength=n.size)
    last = int(np.flatnonzero(n)[-1]) + 1 if n.any() else 0
    n, hv = n[:last], hv[:last]
    prof = np.where(n > 0, hv / np.maximum(n, 1), 0.0)
    prof = ndimage.gaussian_filter1d(prof, 0.5, mode="nearest")
    outer = prof[int(0.38 * spacing) :]
    floor = float(np.median(outer)) if outer.size else 0.0
    peak = float(prof.max())
    if peak <= floor:
        return spacing / 4.0
    top = int(np.argmax(prof))
    cut = floor + level * (peak - floor)
    below = np.flatnonzero(prof[top:] < cut)
    if below.size == 0:
        return half
    j = top + int(below[0])
    # linear interpolation between bins j-1 and j (bin j at distance j)
    if j > top:
        y0, y1 = prof[j - 1], prof[j]
        frac = (y0 - cut) / (y0 - y1) if y0 != y1 else 0.0
        return float(min(half, j - 1 + frac))
    return float(min(half, j))
