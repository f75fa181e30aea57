"""A quantification model: the response definition, the calibration and how spectra were cleaned.

Fitted once from standards (``mapkit calibrate``), saved as JSON, and applied to any map
(``mapkit analyse --model-file``, ``mapkit batch --model-file``). Applying it refuses a map cleaned with
another recipe, a different analyte, or a library that lacks its references.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..core.provenance import library_versions
from ..core.ramanmap import RamanMap
from ..core.result import Axis, Result
from ..errors import MapkitError
from .calibration import PolynomialCalibration
from .concentration import concentration_map
from .pls import PLSCalibration
from .response import Response

MODELS = ("linear", "quadratic", "pls")
KIND = "mapkit quantification model"


@dataclass
class QuantModel:
    response: Response
    calibration: object
    recipe: list = field(default_factory=list)        # Recipe.fingerprint()
    recipe_text: str = ""
    standards: dict = field(default_factory=dict)
    raman_shift: np.ndarray | None = None             # axis of the standards (for PLS)

    @property
    def analyte(self):
        return self.calibration.analyte

    @property
    def unit(self):
        return self.calibration.unit

    # -- fitting ---------------------------------------------------------------------------
    @classmethod
    def fit(cls, standards, response: Response, *, model: str = "linear",
            weighting: str = "none", library=None, recipe=None) -> "QuantModel":
        """Fit from a :class:`~mapkit.read.calibration_set.CalibrationSet`.

        The standards are cleaned with ``recipe`` (spectral steps only), their responses
        computed by ``response``, and the calibration fitted against the known contents.
        """
        from ..preprocess.recipe import Recipe

        if model not in MODELS:
            raise MapkitError(f"unknown calibration model {model!r}", field="--model",
                              fix=f"use one of {', '.join(MODELS)}")
        recipe = recipe or Recipe.default()
        spectra, shift = _clean(standards.spectra, standards.raman_shift, recipe,
                                standards.source)
        if model == "pls":
            if response.kind != "spectrum":
                response = Response("spectrum", response.analyte)
            X = response.compute(spectra, shift)
            groups = np.array([n.rsplit("-", 1)[0] for n in standards.names])
            cal = PLSCalibration(analyte=response.analyte, unit=standards.unit).fit(
                X, standards.concentration, groups)
        else:
            if response.kind == "spectrum":
                raise MapkitError("a whole-spectrum response needs the pls model",
                                  field="--model", fix="use --model pls or a band/unmix response")
            y = response.compute(spectra, shift, library)
            cal = PolynomialCalibration(1 if model == "linear" else 2, weighting,
                                        response.analyte, standards.unit).fit(
                standards.concentration, y)
        from ..export.nexus import file_sha256

        src = Path(standards.source)
        info = {"file": src.name, "sha256": file_sha256(src) if src.is_file() else None,
                "n": int(len(standards.names))}
        return cls(response, cal, recipe.fingerprint(), recipe.text, info, shift)

    # -- applying --------------------------------------------------------------------------
    def check_recipe(self, recipe):
        if recipe.fingerprint() != self.recipe:
            raise MapkitError("the map is cleaned with another recipe than the standards were",
                              field="--recipe",
                              fix="clean maps with the recipe saved in the model "
                                  "(mapkit calibrate writes it beside the model)")

    def apply(self, m: RamanMap, library=None, *, name: str = "concentration") -> Result:
        """Concentration map (content, standard uncertainty, flags) of a cleaned map."""
        from ..reduce._common import good_spectra, to_images

        X, good = good_spectra(m, what="quantification")
        if self.response.kind == "spectrum":
            from ..preprocess.axis import resample

            if m.raman_shift.size != self.raman_shift.size or not np.allclose(
                    m.raman_shift, self.raman_shift):
                X = resample(X, m.raman_shift, self.raman_shift)
            y = self.response.compute(X, self.raman_shift)
        else:
            y = self.response.compute(X, m.raman_shift, library)
        x0, s_x0 = self.calibration.inverse(y)
        x0_img = to_images(m, x0[:, None], good)[0]
        s_img = to_images(m, s_x0[:, None], good)[0]
        from ..reduce._common import image_axes

        axes = image_axes(m)
        r = concentration_map(x0_img, s_img, self.calibration, axes, mask=m.mask, name=name)
        r.summary["response"] = self.response.to_dict()
        return r

    # -- files -------------------------------------------------------------------------------
    def to_dict(self) -> dict:
        return {"kind": KIND, "response": self.response.to_dict(),
                "calibration": self.calibration.to_dict(), "summary": self.calibration.summary(),
                "recipe": self.recipe, "recipe_text": self.recipe_text,
                "standards": self.standards,
                "raman_shift": None if self.raman_shift is None else self.raman_shift.tolist(),
                "versions": library_versions()}

    def save(self, path, *, overwrite: bool = True) -> Path:
        from ..export.atomic import atomic_path

        with atomic_path(path, overwrite=overwrite) as tmp:
            tmp.write_text(json.dumps(self.to_dict(), indent=1))
        return Path(path)

    @classmethod
    def load(cls, path) -> "QuantModel":
        path = Path(path)
        if not path.is_file():
            raise MapkitError("model file not found", file=path, fix="check the path")
        try:
            d = json.loads(path.read_text())
            if d.get("kind") != KIND:
                raise KeyError("kind")
            c = d["calibration"]
            cal = (PLSCalibration.from_dict(c) if c["kind"] == "pls"
                   else PolynomialCalibration.from_dict(c))
            return cls(Response.from_dict(d["response"]), cal, d["recipe"], d["recipe_text"],
                       d.get("standards", {}),
                       None if d.get("raman_shift") is None else np.array(d["raman_shift"]))
        except (ValueError, KeyError, TypeError) as exc:
            raise MapkitError(f"not a mapkit quantification model ({exc})", file=path,
                              fix="make one with 'mapkit calibrate'") from None


def _clean(spectra, shift, recipe, source):
    """Run the recipe's spectral steps over a stack of standard spectra."""
    n = spectra.shape[0]
    m = RamanMap(np.asarray(spectra, float)[:, None, :], raman_shift=shift, x=[0.0],
                 y=np.arange(n, dtype=float), source=source)
    clean, _ = recipe.apply(m, spectra_only=True)
    if clean.mask.any():
        bad = int(clean.mask.sum())
        raise MapkitError(f"{bad} standard spectra are dead, saturated or non-finite",
                          file=source, field="standards", fix="remeasure or remove them")
    return np.asarray(clean.intensity, float)[:, 0, :], clean.raman_shift
