"""The bad-input corpus: every case runs the command line on a damaged or unusual input.

Each case states its expected outcome: a one-line error that names the file or field and
what to do, exit status 2 and no traceback; or, where a practitioner expects the tool to
cope (a few dead pixels, negative values after background subtraction, an irregular axis),
a documented graceful behaviour with exit status 0. Inputs are checked unchanged after
every command.
"""

import hashlib

import h5py
import numpy as np
import pytest

from mapkit.cli import main
from mapkit.samples import write_jcamp

SHIFT = np.linspace(200.0, 1800.0, 60)


def _h5(path, cube=None, shift=SHIFT, x=None, y=None, units=("um", "um", "1/cm"), extra=None):
    rng = np.random.default_rng(0)
    cube = rng.poisson(200, (4, 5, shift.size)).astype(np.float32) if cube is None else cube
    ny, nx = (cube.shape + (1, 1))[:2] if np.ndim(cube) >= 2 else (1, 1)
    with h5py.File(path, "w") as f:
        g = f.create_group("entry/map")
        g.create_dataset("intensity", data=cube)
        for name, vals, unit in (("y", y if y is not None else np.arange(ny) * 1.0, units[0]),
                                 ("x", x if x is not None else np.arange(nx) * 1.0, units[1]),
                                 ("raman_shift", shift, units[2])):
            d = g.create_dataset(name, data=vals)
            if unit:
                d.attrs["units"] = unit
        for k, v in (extra or {}).items():
            f[k] = v
    return path


def _cube(**changes):
    rng = np.random.default_rng(1)
    c = rng.poisson(300, (6, 7, SHIFT.size)).astype(np.float32)
    for key, value in changes.items():
        if key == "nan_pixels":
            c[0, 0, 3] = np.nan
            c[2, 3, :] = np.inf
        elif key == "all_nan":
            c[:] = np.nan
        elif key == "dead":
            c[1, 1] = 0.0
            c[4, 2] = 0.0
        elif key == "negative":
            c -= 400.0
    return c


def _table(path, text):
    path.write_text(text)
    return path


def _wide(rows=((0, 0), (1, 0), (0, 1), (1, 1)), ncol=4, decimal="."):
    head = "x,y," + ",".join(str(100 + 10 * i) for i in range(ncol))
    body = [f"{x},{y}," + ",".join(f"{i}{decimal}5" for i in range(ncol)) for x, y in rows]
    return "\n".join([head] + body) + "\n"


GOOD_RECIPE = '[recipe]\nname = "t"\n\n[[step]]\nname = "despike"\n'


def analyse(path, *more):
    return ["analyse", str(path), "--quiet", "--no-figures", "--components", "2", "--classes",
            "2", *more]


# (case, builder(tmp) -> (command args, the input files), expected, words)
CASES = [
    ("missing file", lambda t: (analyse(t / "none.h5"), []), "error", "file not found"),
    ("not HDF5", lambda t: (analyse(_table(t / "a.h5", "hello")), [t / "a.h5"]), "error",
     "not a readable HDF5 file"),
    ("truncated HDF5", lambda t: _truncated(t), "error", "not a readable HDF5 file"),
    ("corrupt HDF5", lambda t: _corrupt(t), "error", "HDF5"),
    ("intensity of strings", lambda t: (analyse(_h5(t / "a.h5", cube=np.array(
        [[["a"] * 60] * 5] * 4, dtype="S1"))), [t / "a.h5"]), "error", "not numeric"),
    ("rank 2 cube", lambda t: (analyse(_h5(t / "a.h5", cube=np.ones((4, 60), np.float32))),
                               [t / "a.h5"]), "error", "rank 2"),
    ("rank 4 cube", lambda t: (analyse(_h5(t / "a.h5", cube=np.ones((2, 4, 5, 60), np.float32))),
                               [t / "a.h5"]), "error", "rank 4"),
    ("zero-length shift axis", lambda t: (analyse(_h5(t / "a.h5", cube=np.ones((4, 5, 0), np.float32),
                                                      shift=np.array([]))), [t / "a.h5"]),
     "error", "empty"),
    ("missing dataset", lambda t: (analyse(_h5(t / "a.h5", extra={"other": [1]}), "--dataset",
                                           "/nothing", "--axes", "y,x,shift", "--shift-dataset",
                                           "/entry/map/raman_shift", "--pixel-size", "1"),
                                   [t / "a.h5"]), "error", "/nothing: dataset is missing"),
    ("NaN-only map", lambda t: (analyse(_h5(t / "a.h5", cube=_cube(all_nan=1))), [t / "a.h5"]),
     "error", "non-finite"),
    ("NaN and Inf pixels", lambda t: (analyse(_h5(t / "a.h5", cube=_cube(nan_pixels=1))),
                                      [t / "a.h5"]), "ok", "2 non-finite"),
    ("dead pixels", lambda t: (analyse(_h5(t / "a.h5", cube=_cube(dead=1))), [t / "a.h5"]),
     "ok", "2 dead"),
    ("negative intensities", lambda t: (analyse(_h5(t / "a.h5", cube=_cube(negative=1))),
                                        [t / "a.h5"]), "ok", "wrote"),
    ("non-monotonic shift", lambda t: (analyse(_h5(t / "a.h5", shift=np.r_[SHIFT[:30], SHIFT[29:59][::-1] + 0.5])),
                                       [t / "a.h5"]), "error", "not monotonic"),
    ("duplicated shift", lambda t: (analyse(_h5(t / "a.h5", shift=np.r_[SHIFT[:30], SHIFT[29:58]])),
                                    [t / "a.h5"]), "error", "duplicated value"),
    ("non-uniform shift", lambda t: (analyse(_h5(t / "a.h5", cube=_cube(),
                                                 shift=np.cumsum(np.r_[200, np.linspace(5, 50, 59)]))),
                                     [t / "a.h5"]), "ok", "wrote"),
    ("shift length mismatch", lambda t: (analyse(_h5(t / "a.h5", cube=_cube(), shift=SHIFT[:50])), [t / "a.h5"]),
     "error", "50 values but the cube has 60"),
    ("unknown units", lambda t: (analyse(_h5(t / "a.h5", units=("um", "furlong", "1/cm"))),
                                 [t / "a.h5"]), "error", "units are 'furlong'"),
    ("missing units", lambda t: (analyse(_h5(t / "a.h5", cube=_cube(), units=(None, None, None))),
                                 [t / "a.h5"]), "ok", "wrote"),
    ("ragged text rows", lambda t: (analyse(_table(t / "a.csv", "x,y,100,200\n0,0,1,2\n1,0,3\n")),
                                    [t / "a.csv"]), "error", "line 3 has 3 values"),
    ("empty cell in a text table", lambda t: (analyse(_table(
        t / "a.csv", "x,y,100,200\n0,0,1,2\n1,0,3,\n0,1,5,6\n1,1,7,8\n")), [t / "a.csv"]),
     "error", "line 3: the value in column '200' is missing (an empty cell)"),
    ("duplicate positions", lambda t: (analyse(_table(t / "a.csv", _wide(((0, 0), (0, 0))))),
                                       [t / "a.csv"]), "error", "appears more than once"),
    ("non-rectangular scan", lambda t: (analyse(_table(t / "a.csv", _wide(((0, 0), (1, 0), (0, 1))))),
                                        [t / "a.csv"]), "error", "not a rectangular grid"),
    ("mixed decimal separators", lambda t: (analyse(_table(t / "a.csv", "x;y;100;200\n0;0;1,5;2.5\n1;0;2.5;3,5\n")),
                                            [t / "a.csv"]), "error", "not a number"),
    ("empty table", lambda t: (analyse(_table(t / "a.csv", "")), [t / "a.csv"]), "error",
     "no data rows"),
    ("unknown table form", lambda t: (analyse(_table(t / "a.csv", "x,y,foo\n0,0,1\n")), [t / "a.csv"]),
     "error", "cannot tell the table's form"),
    ("recipe: unknown step", lambda t: _with_recipe(t, GOOD_RECIPE.replace("despike", "polish")),
     "error", "unknown step 'polish'"),
    ("recipe: out of range", lambda t: _with_recipe(t, GOOD_RECIPE + "threshold = 500.0\n"),
     "error", "out of range"),
    ("recipe: wrong type", lambda t: _with_recipe(t, GOOD_RECIPE + 'threshold = "high"\n'),
     "error", "wrong type"),
    ("recipe: not TOML", lambda t: _with_recipe(t, "[recipe\n"), "error", "not valid TOML"),
    ("fewer than three standards", lambda t: _standards(t, levels=(0, 10)), "error",
     "distinct concentration levels"),
    ("singular calibration design", lambda t: _standards(t, levels=(10, 10, 10)), "error",
     "distinct concentration levels"),
    ("references outside the map's range", lambda t: _narrow_library(t), "error",
     "reference covers"),
    ("more components than channels", lambda t: (["components", str(_h5(t / "a.h5", cube=np.random.default_rng(0).poisson(9, (4, 5, 5)).astype(np.float32), shift=np.linspace(100, 500, 5))), "--n", "8", "--recipe", "none", "--out", str(t / "o"), "--no-figures"], [t / "a.h5"]),
     "error", "n_components = 8 exceeds"),
    ("more classes than pixels", lambda t: (["classes", str(_h5(t / "a.h5", cube=np.random.default_rng(0).poisson(9, (1, 3, 60)).astype(np.float32))), "--n", "5", "--recipe", "none", "--out", str(t / "o"), "--no-figures"], [t / "a.h5"]),
     "error", "n_classes = 5 exceeds"),
    ("output path is a directory", lambda t: (["convert", str(_h5(t / "a.h5")), str(t)], [t / "a.h5"]),
     "error", "is a directory"),
    ("output folder under a file", lambda t: (["convert", str(_h5(t / "a.h5")), str(t / "a.h5" / "b.h5")],
                                              [t / "a.h5"]), "error", "output folder does not exist"),
    ("existing output without --overwrite", lambda t: (["convert", str(_h5(t / "a.h5")), str(_h5(t / "b.h5"))],
                                                       [t / "a.h5", t / "b.h5"]), "error", "--overwrite"),
    ("library with duplicate names", lambda t: _dup_library(t), "error",
     "more than once (in one.jdx and two.jdx)"),
    ("compressed JCAMP-DX", lambda t: _library_file(t, "##TITLE=x\n##XUNITS=1/CM\n##FIRSTX=100\n##LASTX=400\n##NPOINTS=4\n##XYDATA=(X++(Y..Y))\n100@A1B2C3\n##END=\n"),
     "error", "compressed"),
    ("JCAMP-DX in nanometres", lambda t: _library_file(t, "##TITLE=x\n##XUNITS=NANOMETERS\n##XYPOINTS=(XY..XY)\n500,1;600,2;700,3\n##END=\n"),
     "error", "not Raman shift"),
    ("not a model file", lambda t: (analyse(_h5(t / "a.h5"), "--model-file", str(_table(t / "m.json", '{"kind": "other"}'))),
                                    [t / "a.h5", t / "m.json"]), "error", "not a mapkit quantification model"),
    # a foreign shift axis in wavelength: converted with the laser, refused without it
    ("shift axis in nm without the laser", lambda t: _foreign(t, units="nm"), "error",
     "wavelength in nm, and the laser wavelength is unknown; pass --laser"),
    ("shift axis in nm with the laser", lambda t: _foreign(t, units="nm", shift=np.linspace(540, 580, 60),
                                                           more=("--laser", "532")),
     "ok", "converted to Raman shift with the 532 nm laser"),
    ("shift axis in unknown units", lambda t: _foreign(t, units="eV"), "error",
     "units 'eV' are neither Raman shift"),
    ("axis order swapped against the positions", lambda t: _foreign(t, axes="x,y,raman_shift", positions=True),
     "error", "check --axes"),
    ("axis order that nothing confirms", lambda t: _foreign(t), "ok", "nothing in the file confirms it"),
    ("recipe: reversed crop", lambda t: _with_recipe(t, GOOD_RECIPE + '\n[[step]]\nname = "crop"\nlow = 1700.0\nhigh = 300.0\n'),
     "error", "line 10: crop low = 1700 is not below high = 300"),
    ("recipe: crop leaves too few channels", lambda t: _with_recipe(t, GOOD_RECIPE + '\n[[step]]\nname = "crop"\nlow = 1790.0\nhigh = 1800.0\n'),
     "error", "line 7: crop keeps 1 of 60 channels (1800.0-1800.0 1/cm), fewer than the 2 that MCR-ALS with 2 components"),
    ("existing output is found before cleaning", lambda t: _existing_output(t), "error",
     "the output file exists"),
    ("short library is found before cleaning", lambda t: _narrow_library(t, cube=_cube(all_nan=1)),
     "error", "reference covers"),
    ("short library is found before chunk-wise cleaning",
     lambda t: (lambda args, inputs: (args + ["--chunked"], inputs))(*_narrow_library(t, cube=_cube(all_nan=1))),
     "error", "reference covers"),
    ("standards without an analyte line", lambda t: _standards_with(t, analyte=False), "error",
     "does not name its analyte"),
    ("standards with a bad value", lambda t: _standards_with(t, bad="1O0"), "error",
     "line 4: value '1O0' in column '200.0' (column 3) is not a number"),
    ("spectrum far outside the map", lambda t: (["spectrum", str(_h5(t / "a.h5")), "--at", "50", "1"], [t / "a.h5"]),
     "error", "x = 50 um lies outside the map"),
    ("jittered table positions", lambda t: (analyse(_table(t / "a.csv", _wide(((0, 0), (1.01, 0.02), (0.01, 0.99), (0.98, 1.0)), ncol=40))),
                                            [t / "a.csv"]), "error", "pass --position-tolerance"),
    ("jittered table positions with a tolerance", lambda t: (["info", str(_table(t / "a.csv", _wide(((0, 0), (1.01, 0.02), (0.01, 0.99), (0.98, 1.0)), ncol=40))), "--position-tolerance", "0.05"],
                                                             [t / "a.csv"]), "ok", "of 4 positions to a 2 x 2 grid (largest offset"),
    ("2-D stack without positions", lambda t: _foreign(t, stack=True), "error",
     "needs the position of each spectrum"),
    # depth sections and volumes
    ("z column that does not form a grid", lambda t: (["info", str(_table(t / "a.csv", _depth_rows(((0, 0), (1, 0), (0, 2)))))], [t / "a.csv"]),
     "error", "z: the z values do not form a grid: position x=1, y=0 has no spectrum at z=2"),
    ("repeated z values in a table", lambda t: (["info", str(_table(t / "a.csv", _depth_rows(((0, 0), (1, 0), (0, 2), (1, 2), (1, 2)))))], [t / "a.csv"]),
     "error", "appears more than once: a depth value repeats"),
    ("repeated z values in a depth dataset", lambda t: _foreign_section(t, z=[0.0, 2.0, 2.0, 4.0, 6.0, 8.0]),
     "error", "/depth: axis has a duplicated value 2"),
    ("depth section without its depth dataset", lambda t: _foreign_section(t, z=None),
     "error", "names a depth axis z but no depth dataset"),
    ("depth section read by stated axis order", lambda t: _foreign_section(t, z=np.arange(6) * 2.0),
     "ok", "section z,x"),
    ("volume on the chunk-wise path", lambda t: (analyse(_volume(t / "v.h5"), "--chunked"), [t / "v.h5"]),
     "ok", "mode      chunk-wise (--chunked): "),
]


def _volume(path):
    """A small (z, y, x, shift) volume in the mapkit layout."""
    from mapkit import RamanMap
    from mapkit.export import write_map

    cube = np.random.default_rng(0).poisson(200, (3, 4, 5, SHIFT.size)).astype(np.float32)
    return write_map(path, RamanMap(cube, raman_shift=SHIFT, x=np.arange(5.0),
                                    y=np.arange(4.0), z=[0.0, 2.0, 4.0]))


def _depth_rows(rows, ncol=4):
    """A wide table with x and z columns (a depth section) at the given (x, z) positions."""
    head = "x,z," + ",".join(str(100 + 10 * i) for i in range(ncol))
    body = [f"{x},{z}," + ",".join(f"{i}.5" for i in range(ncol)) for x, z in rows]
    return "\n".join([head] + body) + "\n"


def _foreign_section(t, z):
    """A (z, raman_shift, x) cube in a foreign HDF5 file, read with --axes and --z-dataset."""
    cube = np.moveaxis(_cube(), 1, 2)            # (6, 60, 7)
    with h5py.File(t / "f.h5", "w") as f:
        f["data"] = cube
        f["shift"] = SHIFT
        if z is not None:
            f["depth"] = np.asarray(z, float)
            f["depth"].attrs["units"] = "um"
    more = [] if z is None else ["--z-dataset", "/depth"]
    return (["info", str(t / "f.h5"), "--dataset", "/data", "--axes", "z,raman_shift,x",
             "--shift-dataset", "/shift", "--pixel-size", "1", *more], [t / "f.h5"])


def _foreign(t, units=None, shift=SHIFT, axes="y,x,raman_shift", positions=False, stack=False,
             more=()):
    """A cube in a foreign HDF5 layout, read with --dataset/--axes/--shift-dataset."""
    cube = _cube()                               # (6, 7, 60)
    with h5py.File(t / "f.h5", "w") as f:
        f["d/cube"] = cube.reshape(42, 60) if stack else cube
        f["d/axis"] = shift
        if units:
            f["d/axis"].attrs["units"] = units
        f["d/x"], f["d/y"] = np.arange(7.0), np.arange(6.0)
    args = ["--dataset", "/d/cube", "--axes", "pixel,raman_shift" if stack else axes,
            "--shift-dataset", "/d/axis"]
    args += ["--x", "/d/x", "--y", "/d/y"] if positions else ["--pixel-size", "1"]
    return analyse(t / "f.h5", *args, *more), [t / "f.h5"]


def _existing_output(t):
    (t / "out").mkdir()
    (t / "out" / "results.h5").write_bytes(b"an earlier run")
    # an all-NaN map would fail in cleaning: the existing output must be found first
    return analyse(_h5(t / "a.h5", cube=_cube(all_nan=1))), [t / "a.h5", t / "out" / "results.h5"]


def _standards_with(t, analyte=True, bad=None):
    (t / "lib").mkdir()
    for name in ("api", "filler"):
        write_jcamp(t / "lib" / f"{name}.jdx", name, SHIFT, np.ones(SHIFT.size))
    head = "standard,concentration," + ",".join(f"{s:.1f}" for s in SHIFT)
    rows = [f"s{i},{c}," + ",".join("100" for _ in SHIFT) for i, c in enumerate((0, 5, 10))]
    if bad:
        rows[1] = rows[1].replace(",100,", f",{bad},", 1)
    text = ("# analyte: api; unit: % w/w\n" if analyte else "") + "\n".join([head] + rows) + "\n"
    (t / "std.csv").write_text(text)
    return (["calibrate", str(t / "std.csv"), "--library", str(t / "lib"), "--recipe",
             str(_table(t / "r.toml", GOOD_RECIPE)), "--out", str(t / "o")], [t / "std.csv"])


def _truncated(t):
    src = _h5(t / "full.h5", cube=_cube())
    data = src.read_bytes()
    (t / "a.h5").write_bytes(data[: len(data) // 3])
    return analyse(t / "a.h5"), [t / "a.h5"]


def _corrupt(t):
    src = _h5(t / "full.h5", cube=_cube())
    data = bytearray(src.read_bytes())
    data[200:2000] = b"\x00" * 1800
    (t / "a.h5").write_bytes(bytes(data))
    return analyse(t / "a.h5"), [t / "a.h5"]


def _with_recipe(t, text):
    (t / "r.toml").write_text(text)
    return analyse(_h5(t / "a.h5"), "--recipe", str(t / "r.toml")), [t / "a.h5", t / "r.toml"]


def _standards(t, levels):
    head = "standard,concentration," + ",".join(f"{s:.1f}" for s in SHIFT)
    rows = [f"s{i},{c}," + ",".join("100" for _ in SHIFT) for i, c in enumerate(levels)]
    (t / "std.csv").write_text("\n".join([head] + rows) + "\n")
    return (["calibrate", str(t / "std.csv"), "--response-band", "500-600", "--recipe",
             str(_table(t / "r.toml", GOOD_RECIPE)), "--out", str(t / "o")], [t / "std.csv"])


def _narrow_library(t, cube=None):
    (t / "lib").mkdir()
    write_jcamp(t / "lib" / "a.jdx", "a", np.linspace(1000, 1800, 100), np.ones(100))
    cube = _cube() if cube is None else cube
    return analyse(_h5(t / "a.h5", cube=cube), "--library", str(t / "lib")), [t / "a.h5"]


def _dup_library(t):
    (t / "lib").mkdir()
    for name in ("one.jdx", "two.jdx"):
        write_jcamp(t / "lib" / name, "same", SHIFT, np.ones(SHIFT.size))
    return analyse(_h5(t / "a.h5", cube=_cube()), "--library", str(t / "lib")), [t / "a.h5"]


def _library_file(t, text):
    (t / "lib").mkdir()
    (t / "lib" / "x.jdx").write_text(text)
    return analyse(_h5(t / "a.h5", cube=_cube()), "--library", str(t / "lib")), \
        [t / "a.h5", t / "lib" / "x.jdx"]


# -- the optical micrograph (analyse --optical, mapkit micrograph) ---------------------------
def _image(t, name="photo.png", scale=True, shape=(30, 40)):
    from PIL import Image

    Image.fromarray(np.full(shape + (3,), 128, np.uint8)).save(t / name)
    if scale:
        (t / f"{name}.scale.json").write_text('{"pixel_size_um": 0.2}')
    return t / name


def _points(t, rows):
    (t / "pts.csv").write_text("image_x_um,image_y_um,map_x_um,map_y_um\n"
                               + "".join(f"{a},{b},{c},{d}\n" for a, b, c, d in rows))
    return t / "pts.csv"


def _optical(t, image, *more, files=()):
    cube = _h5(t / "a.h5", cube=_cube())       # 6 x 7 pixels, 0-6 µm by 0-5 µm
    return analyse(cube, "--optical", str(image), *more), [t / "a.h5", image, *files]


_GOOD_PAIRS = ((1, 1, 1, 1), (5, 1, 5, 1), (1, 4, 1, 4))
OPTICAL_CASES = [
    ("micrograph missing", lambda t: _optical(t, t / "none.png"), "error",
     "micrograph does not exist"),
    ("micrograph unreadable", lambda t: _optical(t, _table(t / "bad.png", "not an image")),
     "error", "not a readable image"),
    ("micrograph TIFF unreadable", lambda t: _optical(t, _table(t / "bad.tif", "II*\x00junk")),
     "error", "holds no image"),
    ("micrograph without pixel size", lambda t: _optical(t, _image(t, scale=False)), "error",
     "no pixel size"),
    ("micrograph pixel size zero", lambda t: _optical(t, _image(t, scale=False),
                                                      "--optical-pixel-size", "0"),
     "error", "must be positive"),
    ("micrograph scale file with a typo", lambda t: (_table(t / "photo.png.scale.json", '{"pixel_size": 1}'), _optical(t, _image(t, scale=False)))[1],
     "error", "unknown key 'pixel_size'"),
    ("two control points", lambda t: _optical(t, _image(t), "--control-points",
                                              str(_points(t, _GOOD_PAIRS[:2]))), "error",
     "needs at least 3"),
    ("collinear control points", lambda t: _optical(
        t, _image(t), "--control-points", str(_points(t, ((1, 1, 1, 1), (2, 2, 2, 2),
                                                         (3, 3, 3, 3), (4, 4, 4, 4))))),
     "error", "on one line"),
    ("control point outside the map", lambda t: _optical(
        t, _image(t), "--control-points", str(_points(t, _GOOD_PAIRS[:2] + ((1, 4, 1, 40),)))),
     "error", "outside the map"),
    ("control point outside the micrograph", lambda t: _optical(
        t, _image(t), "--control-points", str(_points(t, _GOOD_PAIRS[:2] + ((1, 40, 1, 4),)))),
     "error", "outside the micrograph"),
    ("control points without a micrograph", lambda t: (analyse(_h5(t / "a.h5", cube=_cube()),
                                                               "--control-points", "p.csv"),
                                                       [t / "a.h5"]),
     "error", "micrograph options without a micrograph"),
    ("micrograph subcommand on a map without results", lambda t: (
        ["micrograph", str(_h5(t / "a.h5", cube=_cube())), str(_image(t, scale=False)), "--out",
         str(t / "r.h5")], [t / "a.h5", t / "photo.png"]), "error", "no pixel size"),
]
CASES += OPTICAL_CASES


def _digest(paths):
    return {p: hashlib.sha256(p.read_bytes()).hexdigest() for p in paths if p.is_file()}


def test_corpus_is_large_enough():
    assert len(CASES) >= 30


@pytest.mark.parametrize("case, build, expected, words", CASES, ids=[c[0] for c in CASES])
def test_bad_input(tmp_path, capsys, case, build, expected, words):
    args, inputs = build(tmp_path)
    if "--out" not in args and args[0] not in ("convert", "spectrum", "info"):
        args = args + ["--out", str(tmp_path / "out")]
    before = _digest(inputs)
    rc = main(args)
    out, err = capsys.readouterr()
    assert _digest(inputs) == before, "an input file was modified"
    assert "Traceback" not in err
    if expected == "error":
        assert rc == 2, (rc, out, err)
        lines = err.strip().splitlines()
        assert len(lines) == 1, err
        assert words in lines[0], lines[0]
        assert "; " in lines[0], "the message says what to do"
    else:
        assert rc == 0, err
        assert words in out, out


@pytest.mark.parametrize("case, build, expected, words", OPTICAL_CASES,
                         ids=[c[0] for c in OPTICAL_CASES])
def test_bad_micrograph_writes_nothing(tmp_path, capsys, case, build, expected, words):
    args, inputs = build(tmp_path)
    if "--out" not in args:
        args = args + ["--out", str(tmp_path / "out")]
    before = sorted(p for p in tmp_path.rglob("*"))
    assert main(args) == 2
    assert sorted(p for p in tmp_path.rglob("*")) == before, "something was written"


def test_text_table_too_large_for_memory_is_told_to_convert(tmp_path, capsys, monkeypatch):
    """A table that would not fit in memory cannot be processed chunk by chunk (only HDF5
    can): one line naming the file and the command that converts it, before it is read."""
    import mapkit.read.table as table
    import mapkit.stream as stream

    path = _table(tmp_path / "big.csv", _wide(ncol=60))
    monkeypatch.setattr(stream, "memory_available", lambda: 1000)   # a tiny machine

    def never(*a, **k):
        raise AssertionError("the table was read")

    monkeypatch.setattr(table, "read_table", never)
    before = _digest([path])
    rc = main(analyse(path, "--out", str(tmp_path / "out")))
    _, err = capsys.readouterr()
    assert rc == 2 and _digest([path]) == before
    lines = err.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in err
    assert "big.csv" in lines[0] and "mapkit convert" in lines[0], lines[0]
    assert not (tmp_path / "out" / "results.h5").exists()


def test_output_folder_that_cannot_be_made_is_one_line(tmp_path, capsys):
    # an --out below a file cannot be made: told before any work, status 2, nothing left
    blocker = tmp_path / "notes.txt"
    blocker.write_text("a file, not a folder")
    path = _h5(tmp_path / "a.h5", cube=_cube())
    rc = main(analyse(path, "--out", str(blocker / "run" / "out")))
    err = capsys.readouterr().err.strip().splitlines()
    assert rc == 2 and len(err) == 1, err
    assert "--out" in err[0] and "cannot be made" in err[0] and "; " in err[0], err[0]
    assert sorted(p.name for p in tmp_path.iterdir()) == ["a.h5", "notes.txt"]


def test_failed_run_leaves_no_output_folder_of_its_own(tmp_path, capsys):
    # a run that fails after its output folder was made removes the folders it made, if
    # empty (common practice: a failed command leaves the disk as it was)
    args, _ = _dup_library(tmp_path)
    out = tmp_path / "new" / "deeper" / "out"
    assert main(args + ["--out", str(out)]) == 2
    assert not (tmp_path / "new").exists()
    kept = tmp_path / "kept"
    kept.mkdir()
    assert main(args + ["--out", str(kept)]) == 2
    assert kept.is_dir()          # a folder that was there before stays
