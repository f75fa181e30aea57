"""Put an optical micrograph on the map's stage coordinates.

Without control points the micrograph sits where its pixel size and origin put it. When
camera and stage disagree, :class:`ControlPointRegistration` fits a similarity (rotation,
uniform scale, shift) or affine transform from the image frame (µm) to the map frame (µm)
to three or more point pairs by least squares (scikit-image's transform estimation), and
reports the residual of every pair. :class:`PlacedImage` holds the image and that
transform; it resamples the micrograph onto any map grid (scikit-image's ``warp``).
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .errors import MapkitError
from .read.optical import OpticalImage

KINDS = ("similarity", "affine")


def _estimate(kind, src, dst):
    from skimage.transform import AffineTransform, SimilarityTransform

    cls = SimilarityTransform if kind == "similarity" else AffineTransform
    if hasattr(cls, "from_estimate"):            # scikit-image >= 0.26
        t = cls.from_estimate(src, dst)
        ok = bool(t)
    else:                                        # pragma: no cover - older scikit-image
        t = cls()
        ok = t.estimate(src, dst)
    return np.asarray(t.params, float) if ok else None


def _spread(points) -> float:
    """Ratio of the smaller to the larger singular value of the centred points (0 = on a line)."""
    c = points - points.mean(axis=0)
    s = np.linalg.svd(c, compute_uv=False)
    return float(s[-1] / s[0]) if s[0] > 0 else 0.0


class ControlPointRegistration:
    """Least-squares transform from image-frame µm to map µm through point pairs.

    Parameters
    ----------
    kind : {"similarity", "affine"}
        Similarity: rotation, one scale and a shift (4 parameters); affine: 6 parameters
        (shear and unequal scales as well).
    min_spread : float
        Refuse pairs whose points lie nearer a line than this (ratio of the singular values
        of the centred points).

    Attributes
    ----------
    matrix_ : ndarray (3, 3)
        Takes ``(x, y, 1)`` in the image frame to ``(x, y, 1)`` on the map, µm.
    residuals_um_ : ndarray (n,)
        Distance between each transformed image point and its map point.
    rms_um_ : float
        Root mean square of the residuals.

    Examples
    --------
    >>> img = np.array([[0., 0.], [10., 0.], [0., 10.]])
    >>> reg = ControlPointRegistration("similarity").fit(img, img * 2 + 5)
    >>> np.round(reg.matrix_, 6).tolist()
    [[2.0, 0.0, 5.0], [0.0, 2.0, 5.0], [0.0, 0.0, 1.0]]
    """

    def __init__(self, kind: str = "similarity", min_spread: float = 1e-3):
        self.kind = kind
        self.min_spread = min_spread

    def fit(self, image_points, map_points, *, source=None):
        if self.kind not in KINDS:
            raise MapkitError(f"unknown transform {self.kind!r}", field="--transform",
                              fix=f"use one of {', '.join(KINDS)}")
        src = np.asarray(image_points, float).reshape(-1, 2)
        dst = np.asarray(map_points, float).reshape(-1, 2)
        if len(src) != len(dst):
            raise MapkitError("image and map points differ in number", file=source,
                              fix="give one map point per image point")
        if len(src) < 3:
            raise MapkitError(f"{len(src)} control-point pair(s); registration needs at least 3",
                              file=source, field="--control-points",
                              fix="add pairs spread over the field of view")
        if min(_spread(src), _spread(dst)) < self.min_spread:
            raise MapkitError("the control points lie on one line, so rotation and scale are "
                              "undetermined", file=source, field="--control-points",
                              fix="add a pair away from that line")
        matrix = _estimate(self.kind, src, dst)
        if matrix is None or not np.isfinite(matrix).all():
            raise MapkitError("the transform could not be estimated from the pairs",
                              file=source, field="--control-points",
                              fix="check that each row pairs the same feature")
        self.matrix_ = matrix
        self.image_points_, self.map_points_ = src, dst
        self.residuals_um_ = np.hypot(*(self.transform(src) - dst).T)
        self.rms_um_ = float(np.sqrt(np.mean(self.residuals_um_ ** 2)))
        return self

    def transform(self, points):
        """Image-frame points (n, 2) in µm → map points (n, 2) in µm."""
        p = np.asarray(points, float).reshape(-1, 2)
        return (self.matrix_ @ np.c_[p, np.ones(len(p))].T).T[:, :2]

    def summary(self) -> dict:
        return {"transform": self.kind, "pairs": int(len(self.residuals_um_)),
                "rms_um": self.rms_um_, "residuals_um": [float(v) for v in self.residuals_um_],
                "matrix": self.matrix_.tolist()}


@dataclass(frozen=True, eq=False)
class PlacedImage:
    """A micrograph and the transform from its frame (µm) to the map's (µm)."""

    image: OpticalImage
    matrix: np.ndarray
    registration: dict | None = None     # ControlPointRegistration.summary() + points

    def pixel_to_map(self) -> np.ndarray:
        """3x3 matrix taking ``(row, col, 1)`` of the image to map ``(y, x, 1)`` in µm.

        This is the affine a viewer needs to draw the image in map coordinates.
        """
        swap = np.array([[0, 1, 0], [1, 0, 0], [0, 0, 1.0]])
        return swap @ self.matrix @ self.image.pixel_to_um() @ swap

    def corners(self) -> np.ndarray:
        """The image's four outer corners on the map, (4, 2) as (x, y) µm."""
        x0, x1, y0, y1 = self.image.extent
        c = np.array([[x0, y0], [x1, y0], [x1, y1], [x0, y1]])
        return (self.matrix @ np.c_[c, np.ones(4)].T).T[:, :2]

    def pixel_size_on_map(self) -> float:
        """Geometric-mean edge of one image pixel on the map, µm."""
        dy, dx = self.image.pixel_size
        return float(np.sqrt(abs(np.linalg.det(self.matrix[:2, :2])) * dx * dy))

    def resample(self, x, y) -> np.ndarray:
        """The micrograph on the map grid with pixel centres ``x``, ``y`` (µm), float in
        0-1, shape ``(len(y), len(x)[, 3])``; NaN where the image does not reach."""
        from skimage.transform import ProjectiveTransform, warp

        x, y = np.asarray(x, float), np.asarray(y, float)
        dx = (x[-1] - x[0]) / (len(x) - 1) if len(x) > 1 else 1.0
        dy = (y[-1] - y[0]) / (len(y) - 1) if len(y) > 1 else 1.0
        grid = np.array([[dx, 0, x[0]], [0, dy, y[0]], [0, 0, 1.0]])  # (col,row) → map µm
        to_pixel = np.linalg.inv(self.image.pixel_to_um()) @ np.linalg.inv(self.matrix) @ grid
        data = np.asarray(self.image.data)
        scale = float(np.iinfo(data.dtype).max) if np.issubdtype(data.dtype, np.integer) else \
            float(np.nanmax(data) or 1.0)
        img = data.astype(np.float64) / scale
        out = warp(img, ProjectiveTransform(matrix=to_pixel), output_shape=(len(y), len(x)),
                   order=1, mode="constant", cval=np.nan, preserve_range=True)
        return out

    def overlap(self, map_x, map_y) -> float:
        """Fraction of the map's area the micrograph covers."""
        xs = np.linspace(map_x[0], map_x[-1], 24)
        ys = np.linspace(map_y[0], map_y[-1], 24)
        xx, yy = np.meshgrid(xs, ys)
        inv = np.linalg.inv(self.matrix)
        p = (inv @ np.c_[xx.ravel(), yy.ravel(), np.ones(xx.size)].T)[:2]
        x0, x1, y0, y1 = self.image.extent
        inside = (p[0] >= x0) & (p[0] <= x1) & (p[1] >= y0) & (p[1] <= y1)
        return float(inside.mean())


def _map_extent(map_x, map_y):
    map_x, map_y = np.asarray(map_x, float), np.asarray(map_y, float)
    hx = abs(map_x[1] - map_x[0]) / 2 if len(map_x) > 1 else 0.5
    hy = abs(map_y[1] - map_y[0]) / 2 if len(map_y) > 1 else 0.5
    return (min(map_x[0], map_x[-1]) - hx, max(map_x[0], map_x[-1]) + hx,
            min(map_y[0], map_y[-1]) - hy, max(map_y[0], map_y[-1]) + hy)


def place_image(image: OpticalImage, map_x, map_y, pairs=None, *, kind: str = "similarity",
                source=None) -> tuple[PlacedImage, list]:
    """Place ``image`` on the map (axes ``map_x``, ``map_y`` in µm); returns (placed, notices).

    ``pairs`` is ``(image_xy_um, map_xy_um)`` (see
    :func:`mapkit.read.optical.read_control_points`); every image point must lie on the
    micrograph and every map point on the map, or the pair is refused with the row that
    is wrong (``source`` names the file in the message).
    """
    notices = list(image.notices)
    if pairs is None:
        placed = PlacedImage(image, np.eye(3), None)
    else:
        src, dst = (np.asarray(p, float).reshape(-1, 2) for p in pairs)
        ix0, ix1, iy0, iy1 = image.extent
        mx0, mx1, my0, my1 = _map_extent(map_x, map_y)
        for k, ((xi, yi), (xm, ym)) in enumerate(zip(src, dst), start=2):
            if not (ix0 <= xi <= ix1 and iy0 <= yi <= iy1):
                raise MapkitError(f"image point ({xi:g}, {yi:g}) µm lies outside the "
                                  f"micrograph ({ix0:g}-{ix1:g}, {iy0:g}-{iy1:g} µm)",
                                  file=source, field=f"row {k}",
                                  fix="give image coordinates in the micrograph's µm frame")
            if not (mx0 <= xm <= mx1 and my0 <= ym <= my1):
                raise MapkitError(f"map point ({xm:g}, {ym:g}) µm lies outside the map "
                                  f"({mx0:g}-{mx1:g}, {my0:g}-{my1:g} µm)", file=source,
                                  field=f"row {k}", fix="give stage coordinates on the map")
        reg = ControlPointRegistration(kind).fit(src, dst, source=source)
        info = {**reg.summary(), "image_points_um": src.tolist(), "map_points_um": dst.tolist()}
        placed = PlacedImage(image, reg.matrix_, info)
    cover = placed.overlap(map_x, map_y)
    if cover == 0:
        notices.append(f"{Path(image.source).name}: the micrograph does not overlap the "
                       "map; check its pixel size and origin")
    elif cover < 0.99:
        notices.append(f"the micrograph covers {100 * cover:.0f} % of the map")
    return placed, notices
