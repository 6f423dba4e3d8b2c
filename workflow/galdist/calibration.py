"""Calibration files: published relations as YAML data, validated, never executed.

A calibration is loaded with ``yaml.safe_load``, checked against
``workflow/schemas/calibration.schema.yaml`` and returned as a frozen
``Calibration``, which evaluates its relation in any form (polynomial, quadratic term
above a break, inverse), with its slope, its variance from the coefficient covariance
and that covariance's square root for Monte Carlo draws: one implementation for
every method. Nothing here knows a method.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass, field
from pathlib import Path

import jsonschema
import numpy as np
import yaml

from . import shipped
from .errors import CalibrationError, ConfigError
from .schema import calibration_schema, check_size, method_calibration_keys, non_finite


@dataclass(frozen=True)
class Calibration:
    name: str
    method: str
    form: str
    band: str
    system: str
    predictor: str
    pivot: float
    coefficients: np.ndarray
    covariance: np.ndarray
    scatter: float
    valid_range: tuple[float, float]
    reference: dict
    provenance: str
    zero_point_error: float = 0.0
    quadratic: dict | None = None
    width_definition: str | None = None
    velocity_definition: str | None = None
    color_bands: tuple[str, str] | None = None
    magnitude_pivot: float | None = None
    notes: str = ""
    #: conventions of the numbers (schema key ``conventions``; galdist.conventions applies them):
    #: the Galactic-extinction convention ("sf11" or "sfd98") and the H0 the zero point
    #: assumes (None: independent of H0)
    extinction_convention: str = "sf11"
    zero_point_h0: float | None = None
    #: how the coefficients were fitted: forward, inverse, bivariate, gaussian_3d or unknown
    fit: str = "unknown"
    #: the keys only this calibration's method has (calibration schema, $defs/method_keys)
    extra: dict = field(default_factory=dict)
    path: str = ""
    sha256: str = ""
    text: str = field(default="", repr=False)

    def citation(self) -> str:
        r = self.reference
        where = f", {r['where']}" if r.get("where") else ""
        return f"{r['authors']} {r['year']}, {r['journal']}{where} ({self.provenance})"

    def in_range(self, x) -> np.ndarray:
        lo, hi = self.valid_range
        x = np.asarray(x, dtype=float)
        return (x >= lo) & (x <= hi)

    def polynomial(self, x, coefficients=None) -> np.ndarray:
        """sum_k a_k (x - pivot)^k, vectorised (Horner). ``coefficients`` may replace the
        file's, coefficients on the last axis (one set per Monte Carlo draw or per row)."""
        c = self.coefficients if coefficients is None else np.asarray(coefficients, dtype=float)
        t = np.asarray(x, dtype=float) - self.pivot
        out = np.zeros(np.shape(t)) + c[..., -1]
        for k in range(c.shape[-1] - 2, -1, -1):
            out = out * t + c[..., k]
        return out

    def polynomial_slope(self, x) -> np.ndarray:
        """d/dx of ``polynomial``."""
        t = np.asarray(x, dtype=float) - self.pivot
        deriv = np.polynomial.polynomial.polyder(self.coefficients)
        return np.polynomial.polynomial.polyval(t, deriv) if deriv.size else np.zeros_like(t)

    def polynomial_variance(self, x) -> np.ndarray:
        """Variance of ``polynomial`` at x from the coefficient covariance."""
        t = np.asarray(x, dtype=float) - self.pivot
        basis = np.stack([t**k for k in range(self.coefficients.size)], axis=-1)
        return np.einsum("...i,ij,...j->...", basis, self.covariance, basis)

    def relation(self, x, coefficients=None, quadratic=None) -> np.ndarray:
        """The relation at predictor x, whatever the form: M(x), or log10 M_b for the
        baryonic form.

        Polynomial forms (luminosity, baryonic, colour_polynomial): ``polynomial`` plus,
        above ``quadratic.break``, c (x - break)^2; inverse: x - pivot = a_0 + a_1 (M -
        magnitude_pivot) solved for M (degree 1). ``coefficients`` and ``quadratic`` (the
        quadratic coefficient) may replace the file's values (Monte Carlo draws).
        """
        x = np.asarray(x, dtype=float)
        if self.form == "inverse":
            c = self.coefficients if coefficients is None else np.asarray(coefficients, dtype=float)
            return self.magnitude_pivot + (x - self.pivot - c[..., 0]) / c[..., 1]
        out = self.polynomial(x, coefficients)
        if self.quadratic is not None:
            q = self.quadratic["coefficient"] if quadratic is None else quadratic
            dt = x - self.quadratic["break"]
            out = out + np.where(dt > 0.0, q * dt * dt, 0.0)
        return out

    def relation_slope(self, x) -> np.ndarray:
        """d relation / dx."""
        x = np.asarray(x, dtype=float)
        if self.form == "inverse":
            return np.full_like(x, 1.0 / self.coefficients[1])
        slope = self.polynomial_slope(x)
        if self.quadratic is not None:
            dt = x - self.quadratic["break"]
            slope = slope + np.where(dt > 0.0, 2.0 * self.quadratic["coefficient"] * dt, 0.0)
        return slope

    def relation_variance(self, x) -> np.ndarray:
        """Variance of the relation at x from its coefficient (co)variance and the
        quadratic coefficient's error."""
        x = np.asarray(x, dtype=float)
        if self.form == "inverse":
            a1 = self.coefficients[1]
            value = self.relation(x)
            jac = np.stack([np.full_like(x, -1.0 / a1), -(value - self.magnitude_pivot) / a1], axis=-1)
            return np.einsum("...i,ij,...j->...", jac, self.covariance, jac)
        var = self.polynomial_variance(x)
        if self.quadratic is not None:
            dt = x - self.quadratic["break"]
            err = float(self.quadratic.get("error", 0.0))
            var = var + np.where(dt > 0.0, (dt * dt * err) ** 2, 0.0)
        return var

    def covariance_root(self) -> np.ndarray:
        """L (k, r) with L L^T = covariance, over its non-zero directions only (r may be
        0): coefficients drawn as a + L u, u standard normal of length r."""
        w, v = np.linalg.eigh(self.covariance)
        keep = w > 1e-15 * max(float(np.max(np.abs(w))), 1e-300)
        return v[:, keep] * np.sqrt(w[keep])


def _fail(path, message):
    raise CalibrationError(f"calibration file {path}: {message}")


def load_calibration(spec: str | Path) -> Calibration:
    """Read, validate and return one calibration: a shipped one by bare name
    (``tf_i_tully_courtois_2012``) or the user's file by path."""
    try:
        path = shipped.find("calibrations", str(spec))
    except FileNotFoundError as exc:
        raise CalibrationError(str(exc)) from None
    if path.exists() and not path.is_file():
        _fail(path, "is not a regular file")
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        _fail(path, f"cannot be read ({exc.strerror})")
    except UnicodeDecodeError as exc:
        _fail(path, f"is not UTF-8 text ({exc})")
    try:
        data = yaml.safe_load(text)
    except yaml.YAMLError as exc:
        _fail(path, f"is not valid YAML: {exc}")
    return calibration_from_mapping(data, text, path)


def calibration_from_mapping(data, text: str | None = None, path: str | Path = "(in memory)") -> Calibration:
    """Validate a calibration's parsed mapping and return it (``load_calibration`` after
    reading the file; ``text``, default the mapping dumped as YAML, gives the SHA-256)."""
    if text is None:
        text = yaml.safe_dump(data, sort_keys=False)
    try:  # size first: the schema check and the others walk the expanded structure
        check_size(data, f"calibration file {path}")
    except ConfigError as exc:
        _fail(path, str(exc).split(": ", 1)[1])
    # a key no method claims is reported last: a missing or wrong `method` is the cause then
    errors = sorted(jsonschema.Draft202012Validator(calibration_schema()).iter_errors(data),
                    key=lambda e: (e.validator == "unevaluatedProperties", list(e.path)))
    if errors:
        e = errors[0]
        key = ".".join(str(p) for p in e.path) or "(top level)"
        _fail(path, f"key '{key}': {e.message}")
    for key, value in non_finite(data):
        _fail(path, f"key '{key}': {value} is not a finite number")
    coeffs = np.asarray(data["coefficients"], dtype=float)
    errs = np.asarray(data["coefficient_errors"], dtype=float)
    if errs.size != coeffs.size:
        _fail(path, f"key 'coefficient_errors' has {errs.size} entries, 'coefficients' has {coeffs.size}")
    if "covariance" in data:
        try:
            cov = np.asarray(data["covariance"], dtype=float)
        except ValueError:  # ragged rows
            cov = np.empty(0)
        if cov.shape != (coeffs.size, coeffs.size):
            _fail(path, f"key 'covariance' must be {coeffs.size}x{coeffs.size}")
        if not np.allclose(cov, cov.T):
            _fail(path, "key 'covariance' must be symmetric")
        eig = np.linalg.eigvalsh(cov)
        if eig.min() < -1e-10 * max(abs(eig).max(), 1e-300):
            _fail(path, f"key 'covariance' must be positive semi-definite (eigenvalues {eig.tolist()}): a "
                        "negative variance would silently drop or distort the calibration error")
    else:
        cov = np.diag(errs**2)
    lo, hi = data["valid_range"]
    if not lo < hi:
        _fail(path, "key 'valid_range' must be [low, high] with low < high")
    colors = data.get("color_bands")
    return Calibration(
        name=data["name"], method=data["method"], form=data["form"], band=data["band"],
        system=data["system"], predictor=data["predictor"], pivot=float(data["pivot"]),
        coefficients=coeffs, covariance=cov, scatter=float(data["scatter"]),
        valid_range=(float(lo), float(hi)), reference=dict(data["reference"]),
        provenance=data["provenance"], zero_point_error=float(data.get("zero_point_error", 0.0)),
        quadratic=data.get("quadratic"), width_definition=data.get("width_definition"),
        velocity_definition=data.get("velocity_definition"),
        color_bands=tuple(colors) if colors else None,
        magnitude_pivot=data.get("magnitude_pivot"), notes=data.get("notes", ""),
        extinction_convention=data["conventions"]["extinction"],
        zero_point_h0=(None if data["conventions"]["zero_point_h0"] is None
                       else float(data["conventions"]["zero_point_h0"])),
        fit=data.get("fit", "unknown"),
        extra={k: data[k] for k in method_calibration_keys().get(data["method"], {}) if k in data},
        path=str(path) if Path(str(path)).is_file() else "", sha256=hashlib.sha256(text.encode("utf-8")).hexdigest(),
        text=text,
    )
