"""Read an optical micrograph (PNG, JPEG, TIFF; grey or RGB) with its scale in µm.

The scale of the image, in order of precedence, comes from

1. the caller (``pixel_size=``, ``origin=``; on the command line ``--optical-pixel-size``
   and ``--optical-origin``);
2. a sidecar file beside the image, named ``<image file name>.scale.json``::

       {"pixel_size_um": 0.5, "origin_um": [10.0, -4.0], "description": "..."}

   ``pixel_size_um`` is one number (square pixels) or ``[dx, dy]``; ``origin_um`` is the
   stage position (x, y) of the image's top-left corner (default ``[0, 0]``);
3. TIFF resolution tags, when their unit is the centimetre or ImageJ's ``unit=micron``
   (inch-based tags usually carry a print resolution, not the optics', and are ignored).

Rows run along +y and columns along +x, as in the map. Pixel centres sit half a pixel
inside the corner: ``x = x0 + (col + 0.5) * dx``. An image larger than the memory budget
is reduced by an integer factor (block mean; JPEG is decoded at reduced scale) with a
notice, and its pixel size grows by that factor.
"""

from __future__ import annotations

import csv
import json
import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..errors import MapkitError

SUFFIXES = (".png", ".jpg", ".jpeg", ".tif", ".tiff")
SIDECAR_SUFFIX = ".scale.json"
_SIDECAR_KEYS = ("pixel_size_um", "origin_um", "description")
#: default budget for the decoded micrograph (it is stored in the results file and drawn)
MAX_BYTES = 256 << 20


@dataclass(frozen=True, eq=False)
class OpticalImage:
    """A micrograph with its physical scale.

    Attributes
    ----------
    data : ndarray
        ``(ny, nx)`` grey or ``(ny, nx, 3)`` RGB, in the file's integer type (or float).
    pixel_size : tuple of float
        ``(dy, dx)`` in µm.
    origin : tuple of float
        ``(x0, y0)``: stage position in µm of the image's top-left corner.
    """

    data: np.ndarray
    pixel_size: tuple
    origin: tuple = (0.0, 0.0)
    source: str = ""
    sha256: str = ""
    scale_from: str = ""
    description: str = ""
    downsampled: int = 1
    notices: tuple = field(default_factory=tuple)

    @property
    def shape(self):
        return self.data.shape[:2]

    @property
    def x(self) -> np.ndarray:
        """Pixel-centre x positions in µm (image frame)."""
        return self.origin[0] + (np.arange(self.shape[1]) + 0.5) * self.pixel_size[1]

    @property
    def y(self) -> np.ndarray:
        """Pixel-centre y positions in µm (image frame)."""
        return self.origin[1] + (np.arange(self.shape[0]) + 0.5) * self.pixel_size[0]

    @property
    def extent(self) -> tuple:
        """``(x_min, x_max, y_min, y_max)`` of the image's outer edges, µm."""
        x0, y0 = self.origin
        return (x0, x0 + self.shape[1] * self.pixel_size[1],
                y0, y0 + self.shape[0] * self.pixel_size[0])

    def pixel_to_um(self) -> np.ndarray:
        """3x3 matrix taking ``(col, row, 1)`` to image-frame ``(x, y, 1)`` in µm."""
        dy, dx = self.pixel_size
        x0, y0 = self.origin
        return np.array([[dx, 0.0, x0 + 0.5 * dx], [0.0, dy, y0 + 0.5 * dy], [0, 0, 1.0]])

    def provenance(self) -> dict:
        return {"source": Path(self.source).name, "sha256": self.sha256,
                "pixel_size_um": [float(self.pixel_size[1]), float(self.pixel_size[0])],
                "origin_um": [float(self.origin[0]), float(self.origin[1])],
                "scale_from": self.scale_from, "downsampled_by": int(self.downsampled),
                "description": self.description, "notices": list(self.notices)}


def _pair(value, what, file, field_name):
    """One positive number or two → (a, b)."""
    if isinstance(value, (int, float)) and not isinstance(value, bool):
        vals = (float(value), float(value))
    elif isinstance(value, (list, tuple)) and len(value) == 2 and all(
            isinstance(v, (int, float)) and not isinstance(v, bool) for v in value):
        vals = (float(value[0]), float(value[1]))
    else:
        raise MapkitError(f"{what} must be one number or two [x, y]", file=file,
                          field=field_name, fix="e.g. 0.5 or [0.5, 0.5]")
    return vals


def sidecar_path(path) -> Path:
    """Where the scale sidecar of an image lives: ``<image file name>.scale.json``."""
    p = Path(path)
    return p.with_name(p.name + SIDECAR_SUFFIX)


def read_sidecar(path) -> dict:
    """The sidecar's pixel size ``(dx, dy)``, origin ``(x0, y0)`` and description, or {}."""
    side = sidecar_path(path)
    if not side.exists():
        return {}
    try:
        doc = json.loads(side.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise MapkitError(f"the scale file is not readable JSON ({exc.__class__.__name__})",
                          file=side, fix="write it as {\"pixel_size_um\": 0.5}") from None
    if not isinstance(doc, dict):
        raise MapkitError("the scale file must hold one JSON object", file=side,
                          fix="write it as {\"pixel_size_um\": 0.5}")
    unknown = sorted(set(doc) - set(_SIDECAR_KEYS))
    if unknown:
        raise MapkitError(f"unknown key {unknown[0]!r}", file=side, field=unknown[0],
                          fix=f"use only {', '.join(_SIDECAR_KEYS)}")
    out = {}
    if "pixel_size_um" in doc:
        out["pixel_size"] = _pair(doc["pixel_size_um"], "pixel_size_um", side, "pixel_size_um")
    if "origin_um" in doc:
        out["origin"] = _pair(doc["origin_um"], "origin_um", side, "origin_um")
    out["description"] = str(doc.get("description", ""))
    out["file"] = side
    return out


def _tiff_pixel_size(page):
    """(dx, dy) in µm from TIFF resolution tags, or None when they carry no optics scale."""
    tags = page.tags
    if "XResolution" not in tags or "YResolution" not in tags:
        return None

    def per_unit(tag):
        num, den = tags[tag].value
        return num / den if den else 0.0

    xr, yr = per_unit("XResolution"), per_unit("YResolution")
    if xr <= 0 or yr <= 0:
        return None
    unit = int(tags["ResolutionUnit"].value) if "ResolutionUnit" in tags else 2
    desc = str(tags["ImageDescription"].value) if "ImageDescription" in tags else ""
    if "unit=micron" in desc or "unit=um" in desc or "unit=\\u00B5m" in desc or "unit=µm" in desc:
        return 1.0 / xr, 1.0 / yr            # ImageJ: pixels per micron
    if unit == 3:                            # pixels per centimetre
        return 1e4 / xr, 1e4 / yr
    return None


def _as_image_array(arr, file):
    """(ny, nx) grey or (ny, nx, 3) RGB from what a decoder returned."""
    arr = np.asarray(arr)
    if arr.ndim == 3 and arr.shape[2] == 4:
        arr = arr[..., :3]                    # drop alpha
    if arr.ndim == 3 and arr.shape[2] == 2:
        arr = arr[..., 0]                     # grey + alpha
    if arr.ndim == 3 and arr.shape[0] in (3, 4) and arr.shape[2] not in (3, 4):
        arr = np.moveaxis(arr[:3], 0, -1)     # planar TIFF
    if arr.dtype == bool:
        arr = arr.astype(np.uint8) * 255
    if not (arr.ndim == 2 or (arr.ndim == 3 and arr.shape[2] == 3)):
        raise MapkitError(f"the image has shape {arr.shape}, not grey (ny, nx) or RGB "
                          "(ny, nx, 3)", file=file, fix="save one grey or RGB plane")
    return arr


def _block_mean(arr, f: int, rows_per_pass: int = 256):
    """Mean over f x f blocks (crops the ragged edge), strip by strip so a memory-mapped
    image is never read whole."""
    if f <= 1:
        return np.asarray(arr)
    ny, nx = arr.shape[0] // f, arr.shape[1] // f
    out = np.empty((ny, nx) + arr.shape[2:], dtype=arr.dtype)
    for r0 in range(0, ny, rows_per_pass):
        r1 = min(ny, r0 + rows_per_pass)
        strip = np.asarray(arr[r0 * f:r1 * f, :nx * f], dtype=np.float64)
        strip = strip.reshape((r1 - r0, f, nx, f) + arr.shape[2:]).mean(axis=(1, 3))
        if np.issubdtype(out.dtype, np.integer):
            strip = np.rint(strip)
        out[r0:r1] = strip.astype(out.dtype)
    return out


def _memory_available():
    from ..stream import memory_available

    return memory_available()


def _decode(path, max_bytes):
    """Decode the image within a memory budget → (array, factor, notices)."""
    suffix = path.suffix.lower()
    if suffix in (".tif", ".tiff"):
        import tifffile

        try:
            tif = tifffile.TiffFile(path)
        except Exception as exc:  # tifffile raises many types for a bad file
            raise MapkitError(f"not a readable TIFF image ({exc.__class__.__name__})",
                              file=path, fix="export the micrograph as PNG, JPEG or TIFF") from None
        with tif:
            if len(tif.pages) == 0:
                raise MapkitError("the TIFF file holds no image", file=path,
                                  fix="export the micrograph as PNG, JPEG or TIFF")
            page = tif.pages[0]
            shape = tuple(page.shape)
            nbytes = int(np.prod(shape)) * page.dtype.itemsize
            tags_scale = _tiff_pixel_size(page)
            f = max(1, math.ceil(math.sqrt(nbytes / max_bytes))) if nbytes > max_bytes else 1
            if f == 1:
                try:
                    arr = page.asarray()
                except Exception as exc:  # damaged strips, unknown compression
                    raise MapkitError(f"the TIFF image data are damaged "
                                      f"({exc.__class__.__name__})", file=path,
                                      fix="export the micrograph again") from None
            else:
                try:
                    arr = tifffile.memmap(path, page=0, mode="r")
                except Exception:  # compressed or strip-scattered: must decode whole
                    arr = None
                if arr is None:
                    if nbytes > 0.5 * _memory_available():
                        raise MapkitError(
                            f"the compressed image needs {nbytes / 2**30:.1f} GiB to decode",
                            file=path, fix="save it as an uncompressed TIFF or a JPEG, "
                                           "or reduce it first")
                    arr = page.asarray()
        arr = _as_image_array(arr, path) if f == 1 else arr
        if f > 1:
            if arr.ndim == 3 and arr.shape[0] in (3, 4) and arr.shape[2] not in (3, 4):
                arr = np.moveaxis(arr, 0, -1)
            arr = _as_image_array(_block_mean(arr, f), path)
        return arr, f, tags_scale

    from PIL import Image

    old = Image.MAX_IMAGE_PIXELS
    Image.MAX_IMAGE_PIXELS = None  # mapkit checks the size itself, against the memory budget
    try:
        return _decode_pil(path, max_bytes)
    finally:
        Image.MAX_IMAGE_PIXELS = old


def _decode_pil(path, max_bytes):
    from PIL import Image, UnidentifiedImageError

    try:
        im = Image.open(path)
    except (UnidentifiedImageError, OSError, ValueError) as exc:
        raise MapkitError(f"not a readable image ({exc.__class__.__name__})", file=path,
                          fix="export the micrograph as PNG, JPEG or TIFF") from None
    with im:
        w, h = im.size
        bands = len(im.getbands())
        nbytes = w * h * min(bands, 3) * (2 if im.mode.startswith("I;16") else 1)
        f = max(1, math.ceil(math.sqrt(nbytes / max_bytes))) if nbytes > max_bytes else 1
        draft = 1
        if f > 1 and im.format == "JPEG":
            # JPEG decodes at 1/2, 1/4 or 1/8 scale without building the full image
            scale = max(s for s in (1, 2, 4, 8) if s <= f)
            im.draft(im.mode, (math.ceil(w / scale), math.ceil(h / scale)))
            draft = round(w / im.size[0])
        elif f > 1 and nbytes > 0.5 * _memory_available():
            raise MapkitError(f"the image needs {nbytes / 2**30:.1f} GiB to decode",
                              file=path, fix="save it as a JPEG or an uncompressed TIFF, "
                                             "or reduce it first")
        try:
            if im.mode in ("P", "PA", "RGBA", "LA", "CMYK", "YCbCr", "1", "HSV", "LAB"):
                im = im.convert("L" if im.mode in ("LA", "1") else "RGB")
            arr = np.asarray(im)
        except (OSError, ValueError, SyntaxError) as exc:
            raise MapkitError(f"the image data are damaged ({exc.__class__.__name__})",
                              file=path, fix="export the micrograph again") from None
    arr = _as_image_array(arr, path)
    rest = max(1, math.ceil(f / draft)) if f > 1 else 1
    return _as_image_array(_block_mean(arr, rest), path), draft * rest, None


def read_optical(path, *, pixel_size=None, origin=None, max_bytes: int | None = None
                 ) -> OpticalImage:
    """Read a micrograph and its scale (see the module docstring for the precedence).

    Parameters
    ----------
    path : path-like
        PNG, JPEG or TIFF file; grey or RGB (alpha is dropped).
    pixel_size : float or (dx, dy), optional
        µm per pixel; overrides the sidecar and TIFF tags.
    origin : (x0, y0), optional
        Stage position in µm of the top-left corner; overrides the sidecar (default 0, 0).
    max_bytes : int, optional
        Budget for the decoded image (default :data:`MAX_BYTES`, at most a tenth of the
        available memory); above it the image is reduced by an integer factor, with a
        notice.

    Raises
    ------
    MapkitError
        Unreadable or missing file, unsupported format, no pixel size anywhere.
    """
    from ..export.nexus import file_sha256

    path = Path(path)
    if not path.is_file():
        raise MapkitError("the micrograph does not exist", file=path,
                          fix="check the path given to --optical")
    if path.suffix.lower() not in SUFFIXES:
        raise MapkitError(f"unsupported micrograph format {path.suffix or '(none)'!r}",
                          file=path, fix=f"use one of {', '.join(SUFFIXES)}")
    side = read_sidecar(path)
    if max_bytes is None:
        max_bytes = int(min(MAX_BYTES, 0.1 * _memory_available()))
    arr, factor, tag_scale = _decode(path, max(1, int(max_bytes)))
    if pixel_size is not None:
        dx, dy = _pair(tuple(pixel_size) if isinstance(pixel_size, (list, tuple)) else pixel_size,
                       "the pixel size", path, "--optical-pixel-size")
        scale_from = "command line"
    elif "pixel_size" in side:
        (dx, dy), scale_from = side["pixel_size"], f"sidecar {side['file'].name}"
    elif tag_scale is not None:
        (dx, dy), scale_from = tag_scale, "TIFF resolution tags"
    else:
        raise MapkitError("the micrograph has no pixel size", file=path,
                          field="--optical-pixel-size",
                          fix=f"give --optical-pixel-size UM or write {sidecar_path(path).name} "
                              "with {\"pixel_size_um\": UM}")
    if not (np.isfinite(dx) and np.isfinite(dy) and dx > 0 and dy > 0):
        raise MapkitError(f"the pixel size must be positive, got {dx:g}, {dy:g} µm", file=path,
                          field="--optical-pixel-size", fix="give the camera's µm per pixel")
    if origin is not None:
        x0, y0 = _pair(tuple(origin), "the origin", path, "--optical-origin")
    else:
        x0, y0 = side.get("origin", (0.0, 0.0))
    notices = ()
    if factor > 1:
        notices = (f"{path.name}: reduced {factor}x (block mean) to fit the memory budget of "
                   f"{max_bytes / 2**20:.0f} MiB; pixel size {dx * factor:g} x {dy * factor:g} µm",)
    return OpticalImage(arr, (dy * factor, dx * factor), (x0, y0), source=str(path),
                        sha256=file_sha256(path), scale_from=scale_from,
                        description=side.get("description", ""), downsampled=factor,
                        notices=notices)


def read_control_points(path, image: OpticalImage | None = None):
    """Control-point pairs from a CSV file → (image_xy_um, map_xy_um), each (n, 2).

    Columns (header row, any order, extra columns such as ``name`` ignored):
    ``map_x_um, map_y_um`` and either ``image_x_um, image_y_um`` (image frame, µm) or
    ``image_col, image_row`` (pixels of the file as given, 0 = centre of the first pixel;
    needs ``image``).
    """
    path = Path(path)
    try:
        with open(path, newline="", encoding="utf-8-sig") as fh:
            rows = [r for r in csv.reader(fh) if r and not r[0].lstrip().startswith("#")]
    except (OSError, UnicodeDecodeError) as exc:
        raise MapkitError(f"cannot read the control points ({exc.__class__.__name__})",
                          file=path, fix="give a CSV file") from None
    if not rows:
        raise MapkitError("the control-point file is empty", file=path,
                          fix="write a header and one row per pair")
    head = [h.strip().lower() for h in rows[0]]
    pixels = "image_col" in head and "image_row" in head
    need = ["map_x_um", "map_y_um"] + (["image_col", "image_row"] if pixels
                                       else ["image_x_um", "image_y_um"])
    for name in need:
        if name not in head:
            raise MapkitError(f"no column {name!r}", file=path, field=name,
                              fix="columns: image_x_um,image_y_um,map_x_um,map_y_um "
                                  "(or image_col,image_row instead of image_*_um)")
    idx = [head.index(n) for n in need]
    values = []
    for k, row in enumerate(rows[1:], start=2):
        try:
            values.append([float(row[i]) for i in idx])
        except (ValueError, IndexError):
            raise MapkitError("a value is missing or not a number", file=path,
                              field=f"row {k}", fix="give four numbers per row") from None
    arr = np.array(values, float).reshape(-1, 4)
    if not np.isfinite(arr).all():
        raise MapkitError("a control point is not finite", file=path, fix="remove NaN/inf rows")
    map_xy, img = arr[:, :2], arr[:, 2:]
    if pixels:
        if image is None:
            raise MapkitError("pixel control points need the image's scale", file=path,
                              field="image_col", fix="give image_x_um and image_y_um")
        dy, dx = (v / image.downsampled for v in image.pixel_size)  # pixels of the file
        img = np.c_[image.origin[0] + (img[:, 0] + 0.5) * dx,
                    image.origin[1] + (img[:, 1] + 0.5) * dy]
    return img, map_xy


def read_placed_image(path):
    """The micrograph stored in a results file as a PlacedImage, or None if it has none."""
    from .. import layout
    from ..register import PlacedImage
    from .hdf5 import open_h5

    with open_h5(path) as f:
        g = f.get(layout.OPTICAL)
        if g is None:
            return None
        data = g["image"][...]
        x, y = g["x"][...], g["y"][...]
        prov = json.loads(g.attrs.get("provenance", "{}"))
        r = f.get(layout.OPTICAL_REGISTRATION)
        matrix = r["matrix"][...] if r is not None else np.eye(3)
        reg = None
        if r is not None and "residual_um" in r:
            reg = {"transform": str(r.attrs["transform"]), "rms_um": float(r.attrs["rms_um"]),
                   "residuals_um": r["residual_um"][...].tolist(),
                   "image_points_um": r["image_points_um"][...].tolist(),
                   "map_points_um": r["map_points_um"][...].tolist(), "matrix": matrix.tolist()}
    dx = float(x[1] - x[0]) if len(x) > 1 else float(prov.get("pixel_size_um", [1, 1])[0])
    dy = float(y[1] - y[0]) if len(y) > 1 else float(prov.get("pixel_size_um", [1, 1])[1])
    img = OpticalImage(data, (dy, dx), (float(x[0] - dx / 2), float(y[0] - dy / 2)),
                       source=prov.get("source", ""), sha256=prov.get("sha256", ""),
                       scale_from=prov.get("scale_from", ""),
                       description=prov.get("description", ""),
                       downsampled=int(prov.get("downsampled_by", 1)),
                       notices=tuple(prov.get("notices", ())))
    return PlacedImage(img, matrix, reg)
