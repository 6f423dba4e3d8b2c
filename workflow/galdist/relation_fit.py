"""Maximum-likelihood fits of a distance-indicator relation to a calibration sample.

A calibration sample is galaxies in groups: every member of a group shares one distance
modulus mu_g, a free parameter of the fit unless the group has an independent modulus
(Cepheid or TRGB, ``ref_mu`` +- ``ref_err``), which then enters as a Gaussian constraint
(fixed where ``ref_err`` is 0). The reference moduli set the zero point; without one
the zero point and the free moduli are degenerate and the fit refuses.

For galaxy i with predictor x_i (log W^i, a colour), corrected apparent magnitude y_i,
their measurement errors and covariance (sx, sy, cxy), and the relation M(x) (a
polynomial in x - pivot, with an optional quadratic term above a break):

* ``forward`` (y on x): r = y - mu_g - M(x), V = sy^2 + M'^2 sx^2 - 2 M' cxy + s^2,
  -ln L = sum [r^2 / V + ln V] / 2 (the x errors enter to first order, common practice);
* ``inverse`` (x on y, degree 1): x - pivot = b0 + b1 (y - mu_g - M_p) + e,
  V = sx^2 + b1^2 sy^2 - 2 b1 cxy + s_x^2;
* ``bivariate`` (orthogonal distance with intrinsic scatter perpendicular to the
  relation; Hogg, Bovy & Lang 2010, arXiv:1008.4686, section 7): d = r / sqrt(1 + M'^2),
  V_perp = (sy^2 + M'^2 sx^2 - 2 M' cxy) / (1 + M'^2) + s_perp^2. With no measurement
  errors its line is the orthogonal (total) least-squares line (Pearson 1901).

Selection (Malmquist bias of the calibration). A sample limited in apparent magnitude
(y_i < y_lim,i, the catalog limit moved by galaxy i's own corrections) is modelled as a
truncation: each galaxy's density is normalised over the selected part,
p(y | x, selected) = N(y; mu_g + M(x), V) / Phi((y_lim - mu_g - M(x)) / sqrt(V)),
so -ln L gains sum ln Phi (e.g. Willick 1994, ApJS 92, 1, the "forward" bias treatment,
from memory). A lower cut on the predictor (x >= x_lim) does the same for the inverse
fit, P(x >= x_lim | y) = Phi((X(y) - x_lim) / sqrt(V)). An HI-flux limit (forward form) acts on a third
variable, the HI "magnitude" s = -2.5 log10 S_21 (s < s_lim): galdist models it with
its own linear relation in the group's frame, s = mu_g + h0 + h1 (x - pivot) + e_s, whose
scatter may correlate with the relation's (correlation rho), and each galaxy's joint
density of (y, s) is normalised by the probability that it passes the flux limit (and
the magnitude limit, if both are declared: the bivariate normal CDF, from Owen's T
function, Owen 1956, Ann. Math. Stat. 27, 1075, from memory). Selection on the variable a form
conditions on is ignorable (a magnitude limit for the inverse fit, a width cut for the
forward and bivariate fits; Schechter 1980, AJ 85, 801, from memory). The bivariate fit
normalises at the galaxy's x with the vertical width sqrt((1 + M'^2) V_perp) (galdist's
choice). The naive fit is the same likelihood without the truncation.

The Fundamental Plane (``fit_plane``; Magoulas et al. 2012, MNRAS 427, 245, from
memory for the likelihood; the 3-D Gaussian description goes back to Saglia et al.
2001 and Colless et al. 2001, MNRAS 321, 277, from memory): galaxy n of group g is
x_n = (r0_n + 0.2 mu_g, s_n, i_n), r the physical log R_e at the group's distance; the
galaxies are a 3-D Gaussian of mean (r_bar, s_bar, i_bar), r_bar on the plane r = a (s -
s_p) + b (i - i_p) + c, and covariance Sigma = sum_k sigma_k^2 v_k v_k^T along the
plane's normal v1 and two in-plane axes (``fp.plane_covariance``); each galaxy's density
is N(x_n; x_bar, Sigma + E_n), E_n its measurement covariance, divided by the
probability f_n that a galaxy of that density passes the sample's cuts (s >= s_min; a
magnitude limit, at the group's distance a bound on 2 r + i) at the group's distance
(``fp.log_selection``, the gaussian estimator's own selection term). Free: a, b, c,
s_bar, i_bar, ln sigma_1..3 and the free moduli. The start is at given slopes
(``PlaneModel.start_slopes``): a regression of r on (s, i) can start in another
principal plane of the Gaussian and stay there.

Errors: the covariance of every parameter is the inverse of the numerical Hessian of
-ln L at the optimum; ``bootstrap`` refits resamples of the groups (seeded).

Pure functions of numpy arrays (the plane's Gaussian and selection from ``galdist.fp``);
nothing here reads files.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field

import numpy as np
from scipy import optimize
from scipy.special import log_ndtr

FORMS = ("forward", "inverse", "bivariate")


@dataclass(frozen=True)
class Sample:
    """One calibration sample, row per galaxy; ``group`` holds integer codes 0..G-1 into
    the per-group arrays ``ref_mu``/``ref_err`` (NaN: no reference modulus)."""

    x: np.ndarray
    y: np.ndarray
    x_err: np.ndarray
    y_err: np.ndarray
    xy_cov: np.ndarray
    group: np.ndarray
    ref_mu: np.ndarray
    ref_err: np.ndarray
    y_limit: np.ndarray | None = None  # per galaxy; +inf or None: no magnitude limit
    x_limit: np.ndarray | None = None  # per galaxy lower cut on x; -inf or None: none
    group_names: tuple = ()
    s: np.ndarray | None = None  # HI magnitude -2.5 log10 S_21 (forward form with a flux limit)
    s_err: np.ndarray | None = None
    s_limit: np.ndarray | None = None  # per galaxy: selected where s < s_limit

    @property
    def n_groups(self) -> int:
        return int(self.ref_mu.size)

    def take_groups(self, chosen: np.ndarray) -> "Sample":
        """The sample made of groups ``chosen`` (codes, repeats allowed: a repeated group
        becomes a distinct group, as a bootstrap over groups needs)."""
        rows, codes = [], []
        for new, g in enumerate(chosen):
            r = np.flatnonzero(self.group == g)
            rows.append(r)
            codes.append(np.full(r.size, new))
        rows = np.concatenate(rows)

        def pick(a):
            return None if a is None else a[rows]

        return Sample(self.x[rows], self.y[rows], self.x_err[rows], self.y_err[rows], self.xy_cov[rows],
                      np.concatenate(codes), self.ref_mu[chosen], self.ref_err[chosen],
                      pick(self.y_limit), pick(self.x_limit), (), pick(self.s), pick(self.s_err),
                      pick(self.s_limit))


@dataclass(frozen=True)
class Model:
    """What to fit: ``form`` (forward, inverse, bivariate), polynomial ``degree`` in
    x - ``pivot``, an optional quadratic term above ``curvature_break`` (forward and
    bivariate), the magnitude pivot of the inverse form, and whether the selection
    enters (``selection``; False is the naive fit)."""

    form: str = "forward"
    degree: int = 1
    pivot: float = 0.0
    magnitude_pivot: float = 0.0
    curvature_break: float | None = None
    selection: bool = True
    hi_flux: bool = False  # model an HI-flux limit (forward form; Sample.s, s_err, s_limit)

    def __post_init__(self):
        if self.form not in FORMS:
            raise ValueError(f"form {self.form!r}: one of {', '.join(FORMS)}")
        if self.degree < 1:
            raise ValueError("degree must be at least 1")
        if self.form == "inverse" and (self.degree != 1 or self.curvature_break is not None):
            raise ValueError("the inverse form is a straight line (degree 1, no curvature)")
        if self.hi_flux and self.form != "forward":
            raise ValueError("an HI-flux limit is modelled for the forward form only")

    @property
    def n_coeff(self) -> int:
        return self.degree + 1 + (self.curvature_break is not None)

    @property
    def with_hi(self) -> bool:
        """The HI relation is part of the likelihood (only where its selection is)."""
        return self.hi_flux and self.selection


@dataclass
class Fit:
    """A fitted relation. ``coefficients`` are the relation's (forward/bivariate: a_0..a_d
    of M(x); inverse: b_0, b_1), then the quadratic coefficient if any; ``scatter`` is
    the intrinsic scatter in magnitudes (inverse: s_x / |b_1|; bivariate: s_perp
    sqrt(1 + a_1^2)); ``scatter_native`` in the form's own variable."""

    model: Model
    coefficients: np.ndarray
    covariance: np.ndarray  # of ``coefficients``
    scatter: float
    scatter_err: float
    scatter_native: float
    group_mu: np.ndarray
    group_mu_err: np.ndarray
    group_free: np.ndarray  # bool per group: a parameter of the fit (else fixed)
    neg_log_like: float
    converged: bool
    params: np.ndarray = field(repr=False)
    param_cov: np.ndarray | None = field(default=None, repr=False)
    hi_relation: dict | None = None  # h0, h1, scatter, correlation (with errors) if modelled

    @property
    def coefficient_errors(self) -> np.ndarray:
        return np.sqrt(np.clip(np.diag(self.covariance), 0.0, None))

    def magnitude(self, x) -> np.ndarray:
        """M(x) of the fitted relation (the inverse form solved for M)."""
        return relation(self.model, self.coefficients, np.asarray(x, dtype=float))[0]


# ------------------------------------------------------------------------- the relation

def relation(model: Model, coeffs: np.ndarray, x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(M(x), dM/dx) for forward/bivariate coefficients; for the inverse form the line
    x - pivot = b0 + b1 (M - M_p) solved for M."""
    t = x - model.pivot
    if model.form == "inverse":
        b0, b1 = coeffs[0], coeffs[1]
        return model.magnitude_pivot + (t - b0) / b1, np.full_like(t, 1.0 / b1)
    poly = coeffs[: model.degree + 1]
    m = np.polynomial.polynomial.polyval(t, poly)
    dm = np.polynomial.polynomial.polyval(t, np.polynomial.polynomial.polyder(poly))
    if model.curvature_break is not None:
        dt = np.maximum(x - model.curvature_break, 0.0)
        m = m + coeffs[-1] * dt * dt
        dm = dm + 2.0 * coeffs[-1] * dt
    return m, dm


# ----------------------------------------------------------------------- the likelihood

@dataclass(frozen=True)
class _Layout:
    """Parameter vector: coefficients, ln s, [h0, h1, ln s_h, atanh rho], free moduli."""

    n_coeff: int
    free: np.ndarray  # bool per group
    fixed_mu: np.ndarray  # per group (used where not free)
    n_hi: int = 0

    @property
    def n_params(self) -> int:
        return self.n_coeff + 1 + self.n_hi + int(self.free.sum())

    def unpack(self, p):
        c = p[: self.n_coeff]
        ln_s = p[self.n_coeff]
        mu = self.fixed_mu.copy()
        mu[self.free] = p[self.n_coeff + 1 + self.n_hi:]
        return c, ln_s, mu

    def hi(self, p):
        return p[self.n_coeff + 1: self.n_coeff + 1 + self.n_hi]


def _free_groups(ref_mu, ref_err):
    """(free, fixed_mu): the groups whose modulus is a parameter (all but those with a
    reference of error 0) and the fixed moduli; refuses a sample without any reference."""
    has_ref = np.isfinite(ref_mu)
    if not has_ref.any():
        raise ValueError("no group has a reference distance modulus (mu_ref): the zero point cannot be "
                         "fitted; give at least one group an independent modulus")
    free = ~(has_ref & (np.nan_to_num(ref_err, nan=0.0) == 0.0))
    return free, np.where(has_ref, ref_mu, 0.0)


def _layout(sample: Sample, model: Model) -> _Layout:
    free, fixed = _free_groups(sample.ref_mu, sample.ref_err)
    if model.with_hi and (sample.s is None or sample.s_limit is None):
        raise ValueError("an HI-flux limit needs the HI magnitudes and their limit (Sample.s, s_limit)")
    return _Layout(model.n_coeff, free, fixed, 4 if model.with_hi else 0)


def log_bivariate_normal_cdf(h, k, rho) -> np.ndarray:
    """ln P(X < h, Y < k) for standard normals of correlation rho, vectorised, by Owen's
    T function: Phi2 = [Phi(h) + Phi(k)] / 2 - T(h, a_h) - T(k, a_k) - beta, a_h = (k - rho
    h) / (h sqrt(1 - rho^2)), beta = 1/2 where h k < 0 (or one is 0 and h + k < 0)
    (Owen 1956, Ann. Math. Stat. 27, 1075, from memory)."""
    from scipy.special import ndtr, owens_t

    h = np.where(h == 0.0, 1e-12, h)
    k = np.where(k == 0.0, 1e-12, k)
    r = np.sqrt(1.0 - rho * rho)
    p = (0.5 * (ndtr(h) + ndtr(k)) - owens_t(h, (k - rho * h) / (h * r)) - owens_t(k, (h - rho * k) / (k * r))
         - np.where(h * k < 0.0, 0.5, 0.0))
    # far in the lower tails the difference loses its digits: bounded below, galdist's choice
    return np.log(np.clip(p, 1e-300, None))


def neg_log_likelihood(p: np.ndarray, sample: Sample, model: Model, layout: _Layout) -> float:
    """-ln L of parameters ``p`` (coefficients, ln s, free group moduli), vectorised."""
    c, ln_s, mu = layout.unpack(p)
    s2 = np.exp(2.0 * ln_s)
    mu_i = mu[sample.group]
    sx2, sy2, cxy = sample.x_err ** 2, sample.y_err ** 2, sample.xy_cov
    if model.form == "inverse":
        b0, b1 = c[0], c[1]
        pred = model.pivot + b0 + b1 * (sample.y - mu_i - model.magnitude_pivot)
        r = sample.x - pred
        var = sx2 + b1 * b1 * sy2 - 2.0 * b1 * cxy + s2
        nll = 0.5 * np.sum(r * r / var + np.log(var))
        if model.selection and sample.x_limit is not None:
            nll += np.sum(log_ndtr((pred - sample.x_limit) / np.sqrt(var)))
    else:
        m, dm = relation(model, c, sample.x)
        r = sample.y - mu_i - m
        meas = sy2 + dm * dm * sx2 - 2.0 * dm * cxy
        if model.form == "forward" and layout.n_hi:
            return _forward_with_hi(p, sample, model, layout, r, meas + s2, mu, mu_i)
        if model.form == "forward":
            var = meas + s2
            nll = 0.5 * np.sum(r * r / var + np.log(var))
            vert = var
        else:
            k = 1.0 + dm * dm
            var = meas / k + s2
            nll = 0.5 * np.sum(r * r / (k * var) + np.log(var))
            vert = k * var
        if model.selection and sample.y_limit is not None:
            nll += np.sum(log_ndtr((sample.y_limit - mu_i - m) / np.sqrt(vert)))
    return _finish(nll, sample, layout, mu)


def _finish(nll, sample, layout, mu) -> float:
    """Add the reference moduli's Gaussian constraints."""
    ref = np.isfinite(sample.ref_mu) & layout.free
    if ref.any():
        nll += 0.5 * np.sum(((mu[ref] - sample.ref_mu[ref]) / sample.ref_err[ref]) ** 2)
    return float(nll) if np.isfinite(nll) else 1e300


def _forward_with_hi(p, sample, model, layout, r, var_y, mu, mu_i) -> float:
    """Forward form with an HI-flux limit: the joint density of the magnitude and HI
    residuals, normalised by the probability of passing the flux (and magnitude) limit."""
    h0, h1, ln_sh, z_rho = layout.hi(p)
    rho = np.tanh(z_rho)
    sh = np.exp(ln_sh)
    s_int = np.exp(p[layout.n_coeff])
    pred_s = mu_i + h0 + h1 * (sample.x - model.pivot)
    rs = sample.s - pred_s
    var_s = sample.s_err ** 2 + sh * sh
    cov = rho * s_int * sh
    det = var_y * var_s - cov * cov
    nll = 0.5 * np.sum((var_s * r * r - 2.0 * cov * r * rs + var_y * rs * rs) / det + np.log(det))
    ks = (sample.s_limit - pred_s) / np.sqrt(var_s)
    if sample.y_limit is not None:
        m = relation(model, p[: layout.n_coeff], sample.x)[0]
        hy = (sample.y_limit - mu_i - m) / np.sqrt(var_y)
        nll += np.sum(log_bivariate_normal_cdf(hy, ks, cov / np.sqrt(var_y * var_s)))
    else:
        nll += np.sum(log_ndtr(ks))
    return _finish(nll, sample, layout, mu)


def _start(sample: Sample, model: Model, layout: _Layout) -> np.ndarray:
    """Least-squares start: y on the polynomial with one intercept per group, the zero
    point then set by the groups' reference moduli."""
    t = sample.x - model.pivot
    g = sample.n_groups
    basis = np.stack([t ** k for k in range(1, model.degree + 1)], axis=1)
    onehot = np.zeros((t.size, g))
    onehot[np.arange(t.size), sample.group] = 1.0
    present = onehot.sum(axis=0) > 0
    sol, *_ = np.linalg.lstsq(np.hstack([basis, onehot[:, present]]), sample.y, rcond=None)
    inter = np.full(g, np.nan)
    inter[present] = sol[model.degree:]
    has_ref = np.isfinite(sample.ref_mu) & present
    a0 = float(np.mean(inter[has_ref] - sample.ref_mu[has_ref])) if has_ref.any() else 0.0
    mu = np.where(present, inter - a0, np.nanmean(inter) - a0)
    mu = np.where(np.isfinite(sample.ref_mu), sample.ref_mu, mu)
    coeffs = np.concatenate([[a0], sol[: model.degree]])
    resid = sample.y - mu[sample.group] - np.polynomial.polynomial.polyval(t, coeffs)
    s = max(float(np.std(resid)), 1e-3)
    if model.form == "inverse":
        a1 = coeffs[1] if coeffs[1] != 0 else -1.0
        c = np.array([(model.magnitude_pivot - a0) / a1, 1.0 / a1])
        s = s / abs(a1)
    elif model.form == "bivariate":
        c = coeffs
        s = s / np.sqrt(1.0 + coeffs[1] ** 2)
    else:
        c = coeffs
    if model.curvature_break is not None:
        c = np.append(c, 0.0)
    hi = []
    if layout.n_hi:
        design = np.stack([np.ones_like(t), t], axis=1)
        (h0, h1), *_ = np.linalg.lstsq(design, sample.s - mu[sample.group], rcond=None)
        sh = max(float(np.std(sample.s - mu[sample.group] - h0 - h1 * t)), 1e-3)
        hi = [h0, h1, np.log(sh), 0.0]
    return np.concatenate([c, [np.log(s)], hi, mu[layout.free]])


def _gradient(f, p, h):
    g = np.empty_like(p)
    for i in range(p.size):
        e = np.zeros_like(p)
        e[i] = h[i]
        g[i] = (f(p + e) - f(p - e)) / (2.0 * h[i])
    return g


def _hessian(f, p, h):
    """Central-difference Hessian of f at p with steps h."""
    n = p.size
    out = np.empty((n, n))
    f0 = f(p)
    for i in range(n):
        ei = np.zeros(n)
        ei[i] = h[i]
        out[i, i] = (f(p + ei) - 2.0 * f0 + f(p - ei)) / h[i] ** 2
        for j in range(i + 1, n):
            ej = np.zeros(n)
            ej[j] = h[j]
            v = (f(p + ei + ej) - f(p + ei - ej) - f(p - ei + ej) + f(p - ei - ej)) / (4.0 * h[i] * h[j])
            out[i, j] = out[j, i] = v
    return out


def _minimise(f, p0, covariance: bool):
    """(optimum, its covariance (inverse Hessian) or None, BFGS's success) of -ln L ``f``."""
    res = optimize.minimize(f, p0, method="BFGS", options={"gtol": 1e-7, "maxiter": 5000})
    p = res.x
    h = 1e-4 * np.maximum(1.0, np.abs(p))
    cov_p = None
    if covariance:
        # Newton polish (one Hessian, fresh gradients): BFGS's finite-difference
        # gradient stops short of the optimum
        hess = _hessian(f, p, h)
        moved = False
        for _ in range(3):
            try:
                step = np.linalg.solve(hess, _gradient(f, p, h))
            except np.linalg.LinAlgError:
                break
            if f(p - step) <= f(p):
                p, moved = p - step, True
            else:
                break
        if moved:
            hess = _hessian(f, p, h)
        try:
            cov_p = np.linalg.inv(hess)
        except np.linalg.LinAlgError:
            cov_p = np.full_like(hess, np.nan)
    return p, cov_p, bool(res.success)


def fit(sample: Sample, model: Model, covariance: bool = True, start: np.ndarray | None = None) -> Fit:
    """The maximum-likelihood relation, intrinsic scatter and group moduli; with
    ``covariance``, their covariance from the Hessian of -ln L (else NaN errors)."""
    layout = _layout(sample, model)

    def f(p):
        return neg_log_likelihood(p, sample, model, layout)

    p0 = _start(sample, model, layout) if start is None else start
    p, cov_p, success = _minimise(f, p0, covariance)
    c, ln_s, mu = layout.unpack(p)
    nc = model.n_coeff
    cov_c = cov_p[:nc, :nc] if cov_p is not None else np.full((nc, nc), np.nan)
    s_native = float(np.exp(ln_s))
    s_err_native = s_native * np.sqrt(cov_p[nc, nc]) if cov_p is not None else np.nan
    if model.form == "inverse":
        to_mag = 1.0 / abs(c[1])
    elif model.form == "bivariate":
        to_mag = float(np.sqrt(1.0 + relation(model, c, np.array([model.pivot]))[1][0] ** 2))
    else:
        to_mag = 1.0
    mu_err = np.zeros(sample.n_groups)
    first = nc + 1 + layout.n_hi
    if cov_p is not None:
        mu_err[layout.free] = np.sqrt(np.clip(np.diag(cov_p)[first:], 0.0, None))
    else:
        mu_err[layout.free] = np.nan
    hi = None
    if layout.n_hi:
        h0, h1, ln_sh, z = layout.hi(p)
        e = (np.sqrt(np.clip(np.diag(cov_p)[nc + 1: first], 0.0, None)) if cov_p is not None
             else np.full(4, np.nan))
        hi = {"h0": float(h0), "h0_err": float(e[0]), "h1": float(h1), "h1_err": float(e[1]),
              "scatter": float(np.exp(ln_sh)), "scatter_err": float(np.exp(ln_sh) * e[2]),
              "correlation": float(np.tanh(z)), "correlation_err": float((1 - np.tanh(z) ** 2) * e[3])}
    return Fit(model, c.copy(), cov_c, s_native * to_mag, s_err_native * to_mag, s_native, mu, mu_err,
               layout.free, float(f(p)), bool(success or cov_p is not None), p, cov_p, hi)


def naive(model: Model) -> Model:
    """The same model without the selection (the fit a limited sample biases)."""
    return dataclasses.replace(model, selection=False)


def bootstrap(sample: Sample, model: Model, n: int, seed: int, best: Fit | None = None) -> np.ndarray:
    """Coefficients and scatter (columns: coefficients..., scatter) of ``n`` refits to
    resamples of the groups drawn with replacement (``numpy`` generator seeded with
    ``seed``). A resample without a group of reference modulus cannot fix the zero point
    and is drawn again."""
    rng = np.random.default_rng(seed)
    out = np.empty((n, model.n_coeff + 1))
    for k in range(n):
        chosen = _draw_groups(rng, sample.ref_mu)
        sub = sample.take_groups(chosen)
        start = None
        if best is not None:
            layout = _layout(sub, model)
            start = np.concatenate([best.params[: model.n_coeff + 1 + layout.n_hi],
                                    best.group_mu[chosen][layout.free]])
        one = fit(sub, model, covariance=False, start=start)
        out[k] = np.append(one.coefficients, one.scatter)
    return out


def _draw_groups(rng, ref_mu) -> np.ndarray:
    """Group codes drawn with replacement, again until one has a reference modulus."""
    has_ref = np.isfinite(ref_mu)
    while True:
        chosen = rng.integers(0, ref_mu.size, ref_mu.size)
        if has_ref[chosen].any():
            return chosen


def residuals(sample: Sample, result: Fit) -> np.ndarray:
    """Magnitude residuals y - mu_g - M(x) of every galaxy about the fitted relation."""
    return sample.y - result.group_mu[sample.group] - result.magnitude(sample.x)


# ------------------------------------------------------------ the Fundamental Plane

@dataclass(frozen=True)
class PlaneSample:
    """Early types in groups for a plane fit, row per galaxy.

    ``r0`` is log10 R_e (kpc) the galaxy would have at distance modulus 0, so at its
    group's modulus mu_g it is r0 + 0.2 mu_g (the angular-diameter distance is
    D_L / (1 + z)^2 with the galaxy's own z: ``galdist.calibrate`` says how); ``s``,
    ``i`` the corrected log sigma_0 and log <I_e>; ``cov`` (n, 3, 3) the measurement
    covariance of (r, s, i); groups as in ``Sample``. Selection: ``s_min``, the cut
    s >= s_min (None: none), and ``u_limit0``, a magnitude limit written per galaxy as
    2 r + i >= u_limit0 + 0.4 mu_g (None: none).
    """

    r0: np.ndarray
    s: np.ndarray
    i: np.ndarray
    cov: np.ndarray
    group: np.ndarray
    ref_mu: np.ndarray
    ref_err: np.ndarray
    s_min: float | None = None
    u_limit0: np.ndarray | None = None
    group_names: tuple = ()

    @property
    def n_groups(self) -> int:
        return int(self.ref_mu.size)

    def take_groups(self, chosen: np.ndarray) -> "PlaneSample":
        """As ``Sample.take_groups``."""
        rows = [np.flatnonzero(self.group == g) for g in chosen]
        codes = np.concatenate([np.full(r.size, new) for new, r in enumerate(rows)])
        rows = np.concatenate(rows)
        return PlaneSample(self.r0[rows], self.s[rows], self.i[rows], self.cov[rows], codes,
                           self.ref_mu[chosen], self.ref_err[chosen], self.s_min,
                           None if self.u_limit0 is None else self.u_limit0[rows])


@dataclass(frozen=True)
class PlaneModel:
    """The plane r = a (s - pivot_s) + b (i - pivot_i) + c with the 3-D Gaussian of
    Magoulas et al. 2012; ``selection`` False is the naive fit."""

    pivot_s: float = 0.0
    pivot_i: float = 0.0
    selection: bool = True
    form: str = "plane"
    #: where the search starts: typical published slopes (Magoulas et al. 2012 J band:
    #: a = 1.52, b = -0.89, from memory); galdist.calibrate passes the run's calibration's
    start_slopes: tuple = (1.5, -0.9)


@dataclass
class PlaneFit:
    """A fitted plane: ``coefficients`` [a, b, c] with their ``covariance``, the
    Gaussian's ``centre`` (s_bar, i_bar) and widths ``sigmas`` (sigma_1 normal to the
    plane, sigma_2, sigma_3 along v2, v3; dex) with errors, ``scatter`` = sigma_1
    sqrt(1 + a^2 + b^2) (dex in r), the group moduli as ``Fit``'s."""

    model: PlaneModel
    coefficients: np.ndarray
    covariance: np.ndarray
    centre: np.ndarray
    centre_err: np.ndarray
    sigmas: np.ndarray
    sigmas_err: np.ndarray
    scatter: float
    scatter_err: float
    group_mu: np.ndarray
    group_mu_err: np.ndarray
    group_free: np.ndarray
    neg_log_like: float
    converged: bool
    params: np.ndarray = field(repr=False)
    param_cov: np.ndarray | None = field(default=None, repr=False)

    @property
    def coefficient_errors(self) -> np.ndarray:
        return np.sqrt(np.clip(np.diag(self.covariance), 0.0, None))

    @property
    def normal_is_thinnest(self) -> bool:
        """sigma_1 is the smallest width, as a plane's normal must be. A sample cut hard in
        s (at the Gaussian's centre, in tests) can make another principal plane of the
        Gaussian the likelihood's maximum; the calibrate target reports it."""
        return bool(self.sigmas[0] <= min(self.sigmas[1], self.sigmas[2]))

    def log_radius(self, s, i) -> np.ndarray:
        """r of the plane at (s, i)."""
        a, b, c = self.coefficients
        return a * (np.asarray(s, float) - self.model.pivot_s) + b * (np.asarray(i, float) - self.model.pivot_i) + c


#: plane parameters before the free moduli: a, b, c, s_bar, i_bar, ln sigma_1..3
_PLANE_SHAPE = 8


def _plane_layout(sample: PlaneSample) -> _Layout:
    # _Layout's "coefficients" are the first seven plane parameters, its ln s is ln sigma_3
    free, fixed = _free_groups(sample.ref_mu, sample.ref_err)
    return _Layout(_PLANE_SHAPE - 1, free, fixed)


def plane_neg_log_likelihood(p: np.ndarray, sample: PlaneSample, model: PlaneModel, layout: _Layout) -> float:
    """-ln L of the 3-D Gaussian plane (Magoulas et al. 2012, eq. for the likelihood of
    galaxy n: N(x_n; x_bar, Sigma + E_n) / f_n, from memory): x_n = (r0_n + 0.2 mu_g, s_n,
    i_n), x_bar = (r_bar, s_bar, i_bar) with r_bar on the plane, Sigma from (a, b,
    sigma_1..3) (``fp.plane_covariance``), E_n the measurement covariance, f_n the
    probability that a galaxy of that density passes the sample's cuts at its group's
    distance (``fp.log_selection``; 1 for the naive fit)."""
    from .fp import log_selection, plane_covariance

    a, b, c, s_bar, i_bar = p[:5]
    sig = np.exp(p[5:_PLANE_SHAPE])
    mu = layout.fixed_mu.copy()
    mu[layout.free] = p[_PLANE_SHAPE:]
    mu_i = mu[sample.group]
    r_bar = a * (s_bar - model.pivot_s) + b * (i_bar - model.pivot_i) + c
    d = np.stack([sample.r0 + 0.2 * mu_i - r_bar, sample.s - s_bar, sample.i - i_bar], axis=-1)
    v = plane_covariance(a, b, sig) + sample.cov
    quad = np.einsum("ni,ni->n", d, np.linalg.solve(v, d[..., None])[..., 0])
    nll = 0.5 * np.sum(quad + np.linalg.slogdet(v)[1])
    if model.selection and (sample.s_min is not None or sample.u_limit0 is not None):
        n = mu_i.size
        ell = None if sample.u_limit0 is None else sample.u_limit0 + 0.4 * mu_i
        nll += np.sum(log_selection(v, np.full(n, s_bar), np.full(n, 2.0 * r_bar + i_bar), sample.s_min, ell))
    return _finish(nll, sample, layout, mu)


def _plane_start(sample: PlaneSample, model: PlaneModel, layout: _Layout) -> np.ndarray:
    """Start at the model's ``start_slopes`` (a, b): the group moduli from the members'
    mean r0 - a (s - s_p) - b (i - i_p) (c + 0.2 mu_g; the zero point set by the
    reference moduli), the Gaussian from the sample's moments about that plane. A
    regression of r on (s, i) is biased by the scatter and the selection enough to start
    (and stay) in another principal plane of the Gaussian."""
    from .fp import plane_axes

    a, b = model.start_slopes
    g = sample.n_groups
    counts = np.bincount(sample.group, minlength=g)
    present = counts > 0
    has_ref = np.isfinite(sample.ref_mu) & present
    zero = sample.r0 - a * (sample.s - model.pivot_s) - b * (sample.i - model.pivot_i)
    inter = np.bincount(sample.group, weights=zero, minlength=g) / np.maximum(counts, 1)
    c = float(np.mean(inter[has_ref] - 0.2 * sample.ref_mu[has_ref])) if has_ref.any() else 0.0
    mu = np.where(present, (inter - c) / 0.2, 0.0)
    mu = np.where(np.isfinite(sample.ref_mu), sample.ref_mu, mu)
    x = np.stack([sample.r0 + 0.2 * mu[sample.group], sample.s, sample.i], axis=-1)
    centre = x.mean(axis=0)
    widths = [max(float(np.std((x - centre) @ v)), 1e-3) for v in plane_axes(a, b)]
    c_at_centre = centre[0] - a * (centre[1] - model.pivot_s) - b * (centre[2] - model.pivot_i)
    return np.concatenate([[a, b, c_at_centre, centre[1], centre[2]], np.log(widths), mu[layout.free]])


def fit_plane(sample: PlaneSample, model: PlaneModel, covariance: bool = True,
              start: np.ndarray | None = None) -> PlaneFit:
    """The maximum-likelihood plane, its Gaussian and the group moduli; with
    ``covariance``, their covariance from the Hessian of -ln L (else NaN errors)."""
    layout = _plane_layout(sample)

    def f(p):
        return plane_neg_log_likelihood(p, sample, model, layout)

    p0 = _plane_start(sample, model, layout) if start is None else start
    p, cov_p, success = _minimise(f, p0, covariance)
    cov = cov_p if cov_p is not None else np.full((p.size, p.size), np.nan)
    a, b = p[0], p[1]
    sig = np.exp(p[5:_PLANE_SHAPE])
    norm = np.sqrt(1.0 + a * a + b * b)
    grad = np.array([sig[0] * a / norm, sig[0] * b / norm, sig[0] * norm])  # d scatter / d(a, b, ln sigma_1)
    idx = [0, 1, 5]
    scatter_err = float(np.sqrt(max(grad @ cov[np.ix_(idx, idx)] @ grad, 0.0)))
    diag = np.sqrt(np.clip(np.diag(cov), 0.0, None))
    mu = layout.fixed_mu.copy()
    mu[layout.free] = p[_PLANE_SHAPE:]
    mu_err = np.zeros(sample.n_groups)
    mu_err[layout.free] = diag[_PLANE_SHAPE:]
    return PlaneFit(model, p[:3].copy(), cov[:3, :3].copy(), p[3:5].copy(), diag[3:5], sig, sig * diag[5:8],
                    float(sig[0] * norm), scatter_err, mu, mu_err, layout.free, float(f(p)),
                    bool(success or cov_p is not None), p, cov_p)


def bootstrap_plane(sample: PlaneSample, model: PlaneModel, n: int, seed: int,
                    best: PlaneFit | None = None) -> np.ndarray:
    """As ``bootstrap`` for the plane: columns a, b, c, scatter."""
    rng = np.random.default_rng(seed)
    out = np.empty((n, 4))
    for k in range(n):
        chosen = _draw_groups(rng, sample.ref_mu)
        sub = sample.take_groups(chosen)
        start = None
        if best is not None:
            layout = _plane_layout(sub)
            start = np.concatenate([best.params[:_PLANE_SHAPE], best.group_mu[chosen][layout.free]])
        one = fit_plane(sub, model, covariance=False, start=start)
        out[k] = np.append(one.coefficients, one.scatter)
    return out


def plane_residuals(sample: PlaneSample, result: PlaneFit) -> np.ndarray:
    """r - r_plane(s, i) of every galaxy at its group's fitted modulus (dex)."""
    return sample.r0 + 0.2 * result.group_mu[sample.group] - result.log_radius(sample.s, sample.i)
