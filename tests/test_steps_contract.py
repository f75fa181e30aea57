"""The contract every registered preprocessing step keeps (a conformance suite).

For every step in the registry: the input map is not modified; chunk-wise (Dask) and
whole-cube results are identical; a reversed shift axis gives the reversed result;
float32 and float64 inputs both work; masked pixels stay masked; provenance records the
step. A step added to the registry without an entry in CASES fails
``test_every_step_is_covered``.
"""

import numpy as np
import pytest

from mapkit import RamanMap
from mapkit.preprocess.registry import STEPS, run_step

CASES = [
    ("mask_bad_pixels", {}),
    ("despike", {}),
    ("despike", {"method": "spectral", "threshold": 6.0}),
    ("baseline", {"method": "als"}),
    ("baseline", {"method": "arpls"}),
    ("baseline", {"method": "airpls"}),
    ("baseline", {"method": "modpoly", "order": 3}),
    ("baseline", {"method": "rolling", "half_window": 10}),
    ("smooth", {"method": "savgol", "window": 7, "order": 2}),
    ("smooth", {"method": "whittaker", "lam": 5.0}),
    ("derivative", {"order": 1}),
    ("normalise", {"method": "vector"}),
    ("normalise", {"method": "area"}),
    ("normalise", {"method": "max"}),
    ("normalise", {"method": "snv"}),
    ("normalise", {"method": "band", "low": 590.0, "high": 610.0}),
    ("scatter_correction", {"method": "msc"}),
    ("scatter_correction", {"method": "emsc", "order": 2}),
    ("crop", {"low": 450.0, "high": 900.0}),
    ("resample", {"start": 420.0, "stop": 1180.0, "step": 4.0}),
    ("bin", {"factor": 2}),
    ("correct_axis", {"coefficients": [1.5, 1.001]}),
]
IDS = [f"{n}-{p.get('method', '')}".rstrip("-") for n, p in CASES]
AXIS_KEEPING = {"resample"}          # output lies on the requested axis, not the input's
ALL_PIXEL_STEPS = {"mask_bad_pixels", "bin"}


def contract_map(dtype=np.float64, reverse=False):
    rng = np.random.default_rng(11)
    ny, nx, n = 9, 11, 160
    shift = np.linspace(400.0, 1200.0, n)
    yy, xx = np.mgrid[:ny, :nx]
    a = (xx / nx)[..., None]
    bands = (a * 800 / (1 + ((shift - 600) / 6) ** 2)
             + (1 - a) * 500 / (1 + ((shift - 1000) / 9) ** 2))
    background = 300 + 0.2 * (shift - 400) + 40 * (yy / ny)[..., None]
    cube = rng.poisson(bands + background).astype(np.float64)
    cube[4, 6, 80] += 3000.0                     # a cosmic spike
    mask = np.zeros((ny, nx), bool)
    mask[2, 3] = True
    cube[2, 3] = 0.0
    if reverse:
        cube, shift = cube[..., ::-1], shift[::-1]
    return RamanMap(cube.astype(dtype), raman_shift=shift, x=np.arange(nx) * 1.0,
                    y=np.arange(ny) * 1.0, mask=mask)


def lazy(m, chunks=(4, 5)):
    import dask.array as da
    from dataclasses import replace

    return replace(m, intensity=da.from_array(np.asarray(m.intensity),
                                              chunks=chunks + (m.shape[2],)))


def run(m, name, params):
    out, _ = run_step(m, name, params)
    return out


def test_every_step_is_covered():
    assert {n for n, _ in CASES} == set(STEPS)


@pytest.mark.parametrize("name, params", CASES, ids=IDS)
def test_input_not_modified_and_provenance(name, params):
    m = contract_map()
    before = np.array(m.intensity, copy=True)
    out = run(m, name, params)
    np.testing.assert_array_equal(m.intensity, before)
    assert m.provenance == ()
    assert out.provenance[-1].name == name


@pytest.mark.parametrize("name, params", CASES, ids=IDS)
def test_chunkwise_equals_whole(name, params):
    m = contract_map()
    whole = run(m, name, params)
    chunked = run(lazy(m), name, params)
    np.testing.assert_array_equal(np.asarray(chunked.load().intensity),
                                  np.asarray(whole.intensity))
    np.testing.assert_array_equal(chunked.mask, whole.mask)
    np.testing.assert_array_equal(chunked.raman_shift, whole.raman_shift)


@pytest.mark.parametrize("name, params", CASES, ids=IDS)
def test_reversed_axis_gives_reversed_result(name, params):
    fwd = run(contract_map(), name, params)
    rev = run(contract_map(reverse=True), name, params)
    a = np.asarray(fwd.intensity, float)
    b = np.asarray(rev.intensity, float)
    if name not in AXIS_KEEPING:
        b, rev_shift = b[..., ::-1], rev.raman_shift[::-1]
    else:
        rev_shift = rev.raman_shift
    np.testing.assert_allclose(rev_shift, fwd.raman_shift, rtol=1e-12)
    scale = np.abs(a).max() or 1.0
    np.testing.assert_allclose(b, a, atol=1e-5 * scale)


@pytest.mark.parametrize("name, params", CASES, ids=IDS)
def test_float32_and_float64(name, params):
    a = np.asarray(run(contract_map(np.float64), name, params).intensity, float)
    b = np.asarray(run(contract_map(np.float32), name, params).intensity, float)
    assert np.all(np.isfinite(a)) and np.all(np.isfinite(b))
    np.testing.assert_allclose(b, a, atol=1e-4 * (np.abs(a).max() or 1.0))


@pytest.mark.parametrize("name, params", CASES, ids=IDS)
def test_masked_pixels_stay_masked(name, params):
    m = contract_map()
    out = run(m, name, params)
    if name == "bin":
        assert out.mask.shape == (4, 5)
        return
    assert out.mask[2, 3]
    assert np.all(np.asarray(out.intensity)[2, 3] == 0)
