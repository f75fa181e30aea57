"""How a spectrum becomes the number a calibration relates to content.

A :class:`Response` is part of a saved quantification model, so the same definition is
applied to the standards and to every map.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass

import numpy as np

from ..errors import MapkitError

KINDS = ("unmix_fraction", "band", "spectrum")


@dataclass(frozen=True)
class Response:
    """Definition of the calibration response.

    kind
        ``"unmix_fraction"``: the analyte's share of the summed abundances from unmixing
        against the reference library (with polynomial baseline terms of
        ``baseline_order``); independent of focus and laser power.
        ``"band"``: a band measure (``measure`` area or height) over ``band`` cm⁻¹,
        divided by the same measure of an ``internal_standard`` band when one is given.
        ``"spectrum"``: the whole spectrum, vector-normalised (for PLS).
    """

    kind: str
    analyte: str
    band: tuple | None = None
    measure: str = "area"
    internal_standard: tuple | None = None
    references: tuple = ()
    baseline_order: int | None = 5

    def __post_init__(self):
        if self.kind not in KINDS:
            raise MapkitError(f"unknown response {self.kind!r}", field="response",
                              fix=f"use one of {', '.join(KINDS)}")
        if self.kind == "band" and self.band is None:
            raise MapkitError("a band response needs its range", field="--band",
                              fix="give the analyte band, e.g. 845-872")

    def compute(self, spectra, shift, library=None):
        """Responses of a block of spectra (n, n_shift): (n,), or (n, n_shift) for ``spectrum``."""
        from ..preprocess.normalise import normalise
        from ..reduce.bands import band_height, band_integral

        X = np.atleast_2d(np.asarray(spectra, float))
        if self.kind == "spectrum":
            return normalise(X, shift, method="vector")
        if self.kind == "band":
            func = band_integral if self.measure == "area" else band_height
            value = func(X, shift, *self.band)
            if self.internal_standard is not None:
                ref = func(X, shift, *self.internal_standard)
                value = np.divide(value, ref, out=np.full(value.shape, np.nan),
                                  where=np.abs(ref) > 0)
            return value
        from ..reduce.unmix import unmix_spectra
        from .concentration import response_fraction

        refs = self._references(library)
        R = np.stack([r.on_axis(shift) for r in refs])
        A, _ = unmix_spectra(R, X, shift, self.baseline_order, residual=False)
        return response_fraction(A, [r.name for r in refs], self.analyte)

    def _references(self, library):
        if library is None:
            raise MapkitError("this response unmixes against a reference library",
                              field="--library", fix="pass the library the model was made with")
        by_name = {r.name: r for r in library}
        missing = [n for n in self.references if n not in by_name]
        if missing:
            raise MapkitError(f"the library lacks {missing[0]!r}, which the model was made with",
                              field="--library", fix="use the same reference library")
        return [by_name[n] for n in self.references]

    def to_dict(self) -> dict:
        d = asdict(self)
        d["references"] = list(self.references)
        return d

    @classmethod
    def from_dict(cls, d: dict) -> "Response":
        d = dict(d)
        for key in ("band", "internal_standard"):
            if d.get(key) is not None:
                d[key] = tuple(d[key])
        d["references"] = tuple(d.get("references", ()))
        return cls(**d)
