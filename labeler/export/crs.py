"""Coordinate reference systems for GeoJSON: reading a CRS, reprojection, pixel size, precision.

RFC 7946 positions are WGS 84 longitude/latitude (section 4); rasterio/PROJ does the
reprojection, longitude first. The ground size of a pixel decides how many decimals a
written position keeps (:func:`coordinate_decimals`).
"""

from __future__ import annotations

import math
from collections.abc import Callable

import numpy as np
from affine import Affine
from rasterio.crs import CRS
from rasterio.errors import CRSError
from rasterio.warp import transform as warp_transform

__all__ = [
    "WGS84",
    "as_crs",
    "affine_mapper",
    "reprojector",
    "local_equal_area",
    "ground_sampling_distance",
    "coordinate_decimals",
]

#: WGS 84 longitude/latitude (rasterio keeps the longitude-first order).
WGS84 = CRS.from_epsg(4326)
#: Metres per degree of latitude, upper bound (at the poles; 110.6 km at the equator).
_METRES_PER_DEGREE = 111_700.0


def as_crs(crs: CRS | str, *, name: str = "crs") -> CRS:
    """A :class:`rasterio.crs.CRS` from a CRS, ``"EPSG:32631"``, WKT or PROJ string."""
    if isinstance(crs, CRS):
        return crs
    try:
        return CRS.from_user_input(crs)
    except (CRSError, TypeError, ValueError) as err:
        raise ValueError(
            f"{name}: could not read {crs!r} as a coordinate reference system ({err}); "
            "pass e.g. 'EPSG:32631'"
        ) from None


def affine_mapper(transform: Affine) -> Callable[[np.ndarray], np.ndarray]:
    """A function mapping (N, 2) pixel-corner x, y (column, row) arrays through ``transform``."""
    a, b, c, d, e, f = transform.a, transform.b, transform.c, transform.d, transform.e, transform.f

    def apply(xy: np.ndarray) -> np.ndarray:
        x, y = xy[:, 0], xy[:, 1]
        return np.column_stack([a * x + b * y + c, d * x + e * y + f])

    return apply


def reprojector(src: CRS | str, dst: CRS | str) -> Callable[[np.ndarray], np.ndarray]:
    """A function mapping (N, 2) x, y arrays from ``src`` to ``dst`` (rasterio/PROJ).

    Longitude comes first for geographic CRSs (rasterio's traditional GIS order).
    """
    src, dst = as_crs(src, name="src"), as_crs(dst, name="dst")

    def apply(xy: np.ndarray) -> np.ndarray:
        if len(xy) == 0:
            return xy
        xs, ys = warp_transform(src, dst, xy[:, 0], xy[:, 1])
        return np.column_stack([np.asarray(xs, np.float64), np.asarray(ys, np.float64)])

    return apply


def local_equal_area(lon: float, lat: float) -> CRS:
    """Lambert azimuthal equal-area projection centred on ``(lon, lat)`` (WGS 84, metres)."""
    return CRS.from_proj4(
        f"+proj=laea +lat_0={lat:.9f} +lon_0={lon:.9f} +x_0=0 +y_0=0 +datum=WGS84 +units=m"
    )


def ground_sampling_distance(
    transform: Affine, crs: CRS | str, *, shape: tuple[int, int]
) -> float:
    """Ground size of a pixel at the image centre, in metres (the shorter pixel side).

    The centre pixel's corners are reprojected to WGS 84 and then to a local equal-area
    projection, so projected and geographic CRSs are treated alike.
    """
    src = as_crs(crs)
    r, c = shape[0] // 2, shape[1] // 2
    corners = np.array([[c, r], [c + 1, r], [c, r + 1]], np.float64)
    lonlat = reprojector(src, WGS84)(affine_mapper(transform)(corners))
    local = reprojector(WGS84, local_equal_area(*lonlat[0]))(lonlat)
    side_x = float(np.hypot(*(local[1] - local[0])))
    side_y = float(np.hypot(*(local[2] - local[0])))
    gsd = min(side_x, side_y)
    if not gsd > 0 or not math.isfinite(gsd):
        raise ValueError(
            f"transform: expected pixels of positive ground size, got {gsd} m from {transform!r}"
        )
    return gsd


def coordinate_decimals(
    gsd_m: float | None, *, fraction: float = 0.1, pixel: bool = False
) -> int:
    """Decimals of longitude/latitude that keep rounding below ``fraction`` of a pixel.

    Rounding to ``d`` decimals moves each coordinate by at most ``0.5 * 10**-d`` degrees,
    a vertex by at most ``sqrt(2) * 0.5 * 10**-d * 111.7 km`` (a degree of latitude is
    at most 111.7 km, a degree of longitude at most 111.3 km). The smallest ``d`` that
    keeps this below ``fraction * gsd_m`` is returned: 6 for 1 m pixels (RFC 7946
    section 11.2: 6 decimals are about 10 cm), 8 for 1 cm, 9 for 1 mm.

    Parameters
    ----------
    gsd_m : float or None
        Ground sampling distance in metres; ignored when ``pixel``.
    fraction : float
        Largest vertex displacement, as a share of a pixel.
    pixel : bool
        Coordinates are pixels (x = column, y = row) rather than degrees.

    Returns
    -------
    decimals : int, in 0..15
    """
    if not 0 < fraction <= 1:
        raise ValueError(f"fraction: expected a share of a pixel in (0, 1], got {fraction}")
    if pixel:
        unit_per_pixel = 1.0
        scale = 1.0
    else:
        if gsd_m is None or not gsd_m > 0:
            raise ValueError(f"gsd_m: expected a positive ground sampling distance, got {gsd_m}")
        unit_per_pixel = float(gsd_m)
        scale = _METRES_PER_DEGREE
    bound = fraction * unit_per_pixel / (0.5 * math.sqrt(2.0) * scale)  # 10**-d must be below
    d = max(0, math.ceil(-math.log10(bound)))
    while 10.0**-d >= bound:  # floating-point edges of the logarithm
        d += 1
    while d > 0 and 10.0 ** -(d - 1) < bound:
        d -= 1
    return int(min(max(d, 0), 15))
