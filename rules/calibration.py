"""Calibration maths: least-squares fits, inverse prediction, standard addition.

Pure numerics on plain sequences of floats: no run, no criteria, no I/O.
Every fit is solved on a centred and scaled x by QR (never normal equations),
so the NIST StRD certified values are reproduced to 12 (Norris, NoInt1) and
9 (Pontius, x up to 3e6) significant digits; see tests/test_nist_strd.py.

Weights (``1/x``, ``1/x²`` or explicit ones) are normalised to a mean of 1, so
``residual_sd`` stays in response units and ``weight_sum`` equals the number of
points.
"""

from __future__ import annotations

import bisect
import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from enum import StrEnum

import numpy as np
import numpy.typing as npt

_Array = npt.NDArray[np.float64]


class Model(StrEnum):
    """Calibration model of response against concentration."""

    LINEAR = "linear"  # y = b0 + b1·x
    THROUGH_ZERO = "linear_through_zero"  # y = b1·x
    QUADRATIC = "quadratic"  # y = b0 + b1·x + b2·x²
    AVERAGE_RF = "average_rf"  # y = RF·x, RF the mean of y/x over the standards


class Weighting(StrEnum):
    """Weights of the least-squares fit."""

    NONE = "none"
    INVERSE_X = "1/x"
    INVERSE_X_SQUARED = "1/x2"


#: Number of fitted parameters of each model (p of the RSE and degrees of freedom).
PARAMETERS = {Model.LINEAR: 2, Model.THROUGH_ZERO: 1, Model.QUADRATIC: 3, Model.AVERAGE_RF: 1}

#: Power k of the weight 1/|x|^k of each weighting scheme.
_POWER = {Weighting.NONE: 0, Weighting.INVERSE_X: 1, Weighting.INVERSE_X_SQUARED: 2}

_EPS = float(np.finfo(np.float64).eps)


@dataclass(frozen=True, slots=True)
class _Inverse:
    """What :meth:`Fit.invert` and :meth:`Fit.inverse_uncertainty` need, as plain floats.

    Built once per fit so the per-reading calls do a few float operations only.
    """

    b0: float
    b1: float
    b2: float
    vertex: float  # quadratic only: x of the turning point
    upper_branch: bool  # quadratic only: the calibrated range lies right of the vertex
    textbook: bool  # unweighted straight line: closed-form s(x0)
    var_res: float | None  # s², None without degrees of freedom
    # Covariance of (b0, b1, b2), zero-padded to the quadratic's size.
    c00: float
    c01: float
    c02: float
    c11: float
    c12: float
    c22: float


@dataclass(frozen=True, slots=True)
class Fit:
    """A fitted calibration and how far it can be trusted.

    ``coefficients`` are in ascending powers, always three long for a quadratic
    and two otherwise (b0 is 0.0 for a fit through zero and for average RF).
    ``covariance`` is ``None`` when there are no residual degrees of freedom.
    A b0 held at zero (through zero, average RF) has standard error 0.0 and a
    zero row and column in ``covariance``.

    ``x_mean``, ``y_mean`` and ``sxx`` are weighted (with the normalised
    weights) when the fit is weighted.

    Weighting rule (``1/x``, ``1/x²``): a point weighs ``1/max(|x|, weight_floor)^k``,
    ``weight_floor`` the lowest non-zero ``|x|`` of the fit, divided by ``weight_norm``
    (the mean of those raw weights). So a standard at x = 0 takes the weight of the
    lowest non-zero standard instead of an infinite one, and a new reading below
    that standard (a blank, a negative result) weighs as that standard too.
    """

    model: Model
    weighting: Weighting
    coefficients: tuple[float, ...]
    std_errors: tuple[float | None, ...]
    covariance: tuple[tuple[float, ...], ...] | None
    residual_sd: float | None  # s(y/x); weighted residual SD when weighted
    dof: int
    # R²: uncentred for through-zero and average RF (as NIST certifies); weighted when weighted.
    r_squared: float | None
    r: float | None
    points: int
    levels: int
    x_low: float
    x_high: float
    x_mean: float  # (weighted) mean of x, used by inverse-prediction uncertainty
    y_mean: float
    sxx: float  # Σ w·(x − x̄)²
    weight_sum: float
    rf_mean: float | None = None  # average RF model only
    rf_rsd_pct: float | None = None  # average RF model only
    weight_floor: float = 0.0  # lowest non-zero |x|: smaller |x| weigh as this (1/x, 1/x²)
    weight_norm: float = 1.0  # mean raw weight of the fit, divides every raw weight
    explicit_weights: bool = False  # fitted by fit_weighted; ``weighting`` is then NONE
    # fit_weighted only: (x, 1/w) per level, interpolated for the variance of a new reading.
    reading_variance: tuple[tuple[float, float], ...] = ()
    _inv: _Inverse = field(init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        object.__setattr__(self, "_inv", _precompute(self))

    def predict(self, x: float) -> float:
        """Response the model expects at concentration ``x``."""
        inv = self._inv
        return inv.b0 + x * (inv.b1 + x * inv.b2)

    def invert(self, y: float) -> float | None:
        """Concentration giving response ``y``; for a quadratic the root on the calibrated branch.

        ``None`` when no real concentration gives ``y`` (a quadratic's vertex lies between).
        Outside the calibrated range the result is extrapolated, not clamped: judging
        the range is the caller's business. For a quadratic a root inside
        ``[x_low, x_high]`` is preferred; failing that (or when both are inside) the
        root on the same side of the vertex as the middle of the range.
        """
        inv = self._inv
        if inv.b2 == 0.0:
            if inv.b1 == 0.0:
                return None
            return (y - inv.b0) / inv.b1
        c = inv.b0 - y
        disc = inv.b1 * inv.b1 - 4.0 * inv.b2 * c
        if disc < 0.0:
            return None
        # Stable form: q never subtracts nearly equal numbers; the roots are q/a and c/q.
        q = -0.5 * (inv.b1 + math.copysign(math.sqrt(disc), inv.b1))
        if q == 0.0:
            return inv.vertex  # b1 = 0 and y at the vertex: a double root
        r1 = q / inv.b2
        r2 = c / q
        in1 = self.x_low <= r1 <= self.x_high
        in2 = self.x_low <= r2 <= self.x_high
        if in1 != in2:
            return r1 if in1 else r2
        return max(r1, r2) if inv.upper_branch else min(r1, r2)

    def inverse_uncertainty(self, y: float, replicates: int = 1) -> float | None:
        """Standard uncertainty of :meth:`invert` from the calibration alone.

        Unweighted straight line: the textbook s(x0). Otherwise first-order
        propagation through the covariance plus the new reading's own variance.
        ``None`` when the fit has no degrees of freedom.

        ``replicates`` is the number m of readings averaged into ``y``. For a
        weighted fit the reading's variance is s²/(m·w(x0)), w(x0) the normalised
        weight the weighting rule gives x0; after :func:`fit_weighted`, 1/w is
        interpolated linearly in x between the standards (held beyond the ends).
        """
        if replicates < 1:
            raise ValueError(f"replicates must be at least 1, got {replicates}")
        inv = self._inv
        if inv.var_res is None:
            return None
        x0 = self.invert(y)
        if x0 is None:
            return None
        if inv.textbook:
            b = inv.b1
            dy = y - self.y_mean
            return (math.sqrt(inv.var_res) / abs(b)) * math.sqrt(
                1.0 / replicates + 1.0 / self.points + dy * dy / (b * b * self.sxx)
            )
        slope = inv.b1 + 2.0 * inv.b2 * x0
        if slope == 0.0:
            return None
        # gᵀ·Cov·g, g = (1, x0, x0²); the raw covariance is accurate enough here (the
        # exact-arithmetic check on Pontius agrees to 1e-14).
        x2 = x0 * x0
        var_fit = (
            inv.c00
            + 2.0 * x0 * inv.c01
            + x2 * (inv.c11 + 2.0 * inv.c02)
            + 2.0 * x2 * x0 * inv.c12
            + x2 * x2 * inv.c22
        )
        var_read = inv.var_res * self._reading_variance_factor(x0) / replicates
        return math.sqrt(max(var_read + var_fit, 0.0)) / abs(slope)

    def _reading_variance_factor(self, x0: float) -> float:
        """1/w(x0), the normalised weight's reciprocal for a new reading at ``x0``."""
        if self.explicit_weights:
            knots = self.reading_variance
            i = bisect.bisect_left(knots, (x0, -math.inf))
            if i == 0:
                return knots[0][1]
            if i == len(knots):
                return knots[-1][1]
            (xa, va), (xb, vb) = knots[i - 1], knots[i]
            return va + (vb - va) * (x0 - xa) / (xb - xa)
        k = _POWER[self.weighting]
        if k == 0:
            return 1.0
        return max(abs(x0), self.weight_floor) ** k * self.weight_norm


def _precompute(fit: Fit) -> _Inverse:
    coefs = fit.coefficients
    b0 = coefs[0]
    b1 = coefs[1] if len(coefs) > 1 else 0.0
    b2 = coefs[2] if len(coefs) > 2 else 0.0
    vertex = -b1 / (2.0 * b2) if b2 != 0.0 else math.nan
    upper = 0.5 * (fit.x_low + fit.x_high) >= vertex if b2 != 0.0 else True
    textbook = (
        fit.model is Model.LINEAR and fit.weighting is Weighting.NONE and not fit.explicit_weights
    )
    var_res = fit.residual_sd**2 if fit.residual_sd is not None else None
    c = [[0.0] * 3 for _ in range(3)]
    if fit.covariance is not None:
        for i, row in enumerate(fit.covariance):
            c[i][: len(row)] = row
    return _Inverse(
        b0=b0,
        b1=b1,
        b2=b2,
        vertex=vertex,
        upper_branch=bool(upper),
        textbook=textbook,
        var_res=var_res,
        c00=c[0][0],
        c01=c[0][1],
        c02=c[0][2],
        c11=c[1][1],
        c12=c[1][2],
        c22=c[2][2],
    )


def _as_arrays(x: Sequence[float], y: Sequence[float]) -> tuple[_Array, _Array]:
    xa = np.asarray(x, dtype=np.float64)
    ya = np.asarray(y, dtype=np.float64)
    if xa.ndim != 1 or ya.ndim != 1 or xa.shape != ya.shape:
        raise ValueError(f"x and y must be flat and of one length, got {len(x)} and {len(y)}")
    if not (np.all(np.isfinite(xa)) and np.all(np.isfinite(ya))):
        raise ValueError("x and y must be finite")
    return xa, ya


def _check_determined(xa: _Array, p: int, model: Model) -> int:
    """Number of distinct x; raises when the points cannot determine ``p`` parameters."""
    n = xa.size
    levels = int(np.unique(xa).size)
    if n < p:
        raise ValueError(f"{model.value} needs at least {p} points, got {n}")
    if levels < p:
        raise ValueError(f"{model.value} needs at least {p} distinct x values, got {levels}")
    if model is Model.THROUGH_ZERO and not np.any(xa != 0.0):
        raise ValueError(f"{model.value} needs a non-zero x")
    return levels


def _rule_weights(xa: _Array, weighting: Weighting) -> tuple[_Array, float, float]:
    """Normalised weights of the rule, with the floor and the normaliser used."""
    k = _POWER[weighting]
    if k == 0:
        return np.ones_like(xa), 0.0, 1.0
    ax = np.abs(xa)
    floor = float(ax[ax > 0.0].min())
    raw = np.maximum(ax, floor) ** -float(k)
    norm = float(raw.mean())
    return raw / norm, floor, norm


def fit_calibration(
    x: Sequence[float],
    y: Sequence[float],
    model: Model = Model.LINEAR,
    weighting: Weighting = Weighting.NONE,
) -> Fit:
    """Fit ``y`` against ``x`` with the given model and weighting.

    Raises ``ValueError`` when the points cannot determine the model (fewer
    points than parameters, fewer distinct x than parameters, all x zero
    through zero) or hold a non-finite number.

    Weights ``1/x`` and ``1/x²`` are normalised to a mean of 1; a point at
    x = 0 takes the weight of the lowest non-zero x of the fit (it would
    otherwise be infinite). The weighted R² is R²w = 1 − Σw(y−ŷ)²/Σw(y−ȳw)²,
    ȳw = Σwy/Σw (common practice; no regulatory definition); through zero it is
    the uncentred 1 − Σw(y−ŷ)²/Σw·y², as NIST certifies for NoInt1.

    Average RF: RF = y/x of each standard with x > 0; standards with x ≤ 0
    (blanks) carry no response factor and are left out of the whole fit
    (``points``, ``levels``, ``dof``, residual SD, range). The mean RF is
    unweighted by definition, so ``weighting`` is ignored and the fit records
    ``Weighting.NONE``. Its residual SD is that of y − RF·x with n − 1 degrees
    of freedom and its R² the uncentred one.
    """
    xa, ya = _as_arrays(x, y)
    if model is Model.AVERAGE_RF:
        return _fit_average_rf(xa, ya)
    levels = _check_determined(xa, PARAMETERS[model], model)
    w, floor, norm = _rule_weights(xa, weighting)
    return _fit_polynomial(xa, ya, w, model, weighting, levels, floor, norm)


def fit_weighted(
    x: Sequence[float], y: Sequence[float], weights: Sequence[float], model: Model = Model.LINEAR
) -> Fit:
    """Fit with explicit weights (1/s² of each point, say).

    Weights must be finite and positive; they are normalised to a mean of 1.
    The fit records ``weighting=NONE`` and ``explicit_weights=True``. Average
    RF takes no weights (``ValueError``).
    """
    xa, ya = _as_arrays(x, y)
    wa = np.asarray(weights, dtype=np.float64)
    if wa.shape != xa.shape:
        raise ValueError(f"weights must be one per point, got {wa.size} for {xa.size}")
    if not (np.all(np.isfinite(wa)) and np.all(wa > 0.0)):
        raise ValueError("weights must be finite and greater than zero")
    if model is Model.AVERAGE_RF:
        raise ValueError("the average RF model takes no weights")
    levels = _check_determined(xa, PARAMETERS[model], model)
    w = wa / wa.mean()
    # Variance factor 1/w of each level (mean over replicates), for new readings.
    knots = tuple((float(level), float(np.mean(1.0 / w[xa == level]))) for level in np.unique(xa))
    return _fit_polynomial(
        xa, ya, w, model, Weighting.NONE, levels, 0.0, 1.0, explicit=True, knots=knots
    )


_SPLIT = 134217729.0  # 2**27 + 1, Veltkamp's splitter for doubles


def _two_sum(a: _Array, b: _Array) -> tuple[_Array, _Array]:
    """a + b as an unevaluated sum s + e, exactly (Knuth)."""
    s = a + b
    bb = s - a
    return s, (a - (s - bb)) + (b - bb)


def _two_product(a: _Array, b: _Array) -> tuple[_Array, _Array]:
    """a·b as p + e, exactly (Dekker; no fused multiply-add in Python 3.11)."""
    p = a * b
    ca = _SPLIT * a
    ah = ca - (ca - a)
    al = a - ah
    cb = _SPLIT * b
    bh = cb - (cb - b)
    bl = b - bh
    return p, ((ah * bh - p) + ah * bl + al * bh) + al * bl


def _residuals(xa: _Array, ya: _Array, raw: _Array) -> _Array:
    """y − (b0 + b1·x + b2·x²) with the large terms cancelled exactly."""
    b = [np.full_like(xa, v) for v in raw]
    total, err = _two_sum(ya, -b[0])
    if len(b) > 1:
        p1, e1 = _two_product(b[1], xa)
        total, e = _two_sum(total, -p1)
        err = err + e - e1
    if len(b) > 2:
        sq, esq = _two_product(xa, xa)
        p2, e2 = _two_product(b[2], sq)
        total, e = _two_sum(total, -p2)
        err = err + e - e2 - b[2] * esq
    return total + err


def _fit_polynomial(
    xa: _Array,
    ya: _Array,
    w: _Array,
    model: Model,
    weighting: Weighting,
    levels: int,
    floor: float,
    norm: float,
    explicit: bool = False,
    knots: tuple[tuple[float, float], ...] = (),
) -> Fit:
    """Weighted least squares of a line, a line through zero or a quadratic, by QR."""
    n = xa.size
    p = PARAMETERS[model]
    wsum = float(w.sum())
    x_mean = float(w @ xa) / wsum
    y_mean = float(w @ ya) / wsum
    sxx = float(w @ (xa - x_mean) ** 2)
    through_zero = model is Model.THROUGH_ZERO
    # t = (x − centre)/scale keeps the columns of the design near unit size;
    # through zero only scaling is allowed (centring would add an intercept).
    centre = 0.0 if through_zero else x_mean
    scale = float(np.max(np.abs(xa - centre)))
    t = (xa - centre) / scale
    powers = range(1, 2) if through_zero else range(p)
    sw = np.sqrt(w)
    design = np.column_stack([t**k for k in powers]) * sw[:, None]
    q, r_mat = np.linalg.qr(design)
    beta = np.linalg.solve(r_mat, q.T @ (sw * ya))

    # raw = T·beta maps coefficients of t^k to ascending powers of x (length 2 or 3).
    n_raw = 3 if model is Model.QUADRATIC else 2
    transform = np.zeros((n_raw, len(powers)))
    for col, k in enumerate(powers):
        for j in range(k + 1):
            transform[j, col] = math.comb(k, j) * (-centre) ** (k - j) / scale**k
    raw = transform @ beta
    # Going back to raw powers cancels digits (Norris: b0 = ȳ − b1·x̄ loses three), so
    # refine once on residuals computed in doubled precision.
    residuals = _residuals(xa, ya, raw)
    raw = raw + transform @ np.linalg.solve(r_mat, q.T @ (sw * residuals))
    residuals = _residuals(xa, ya, raw)
    coefficients = tuple(float(v) for v in raw)
    sse = float(w @ residuals**2)

    dof = n - p
    residual_sd: float | None = None
    covariance: tuple[tuple[float, ...], ...] | None = None
    std_errors: tuple[float | None, ...] = (None,) * n_raw
    if dof > 0:
        s = math.sqrt(sse / dof)
        residual_sd = s
        # Cov = s²·M·Mᵀ with M = T·R⁻¹; the std errors as row norms avoid cancellation.
        m = transform @ np.linalg.inv(r_mat)
        covariance = tuple(tuple(float(v) for v in row) for row in (s * s) * (m @ m.T))
        std_errors = tuple(float(v) for v in s * np.sqrt(np.sum(m * m, axis=1)))

    sst = float(w @ ya**2) if through_zero else float(w @ (ya - y_mean) ** 2)
    r_squared = 1.0 - sse / sst if sst > 0.0 else None
    r: float | None = None
    if r_squared is not None:
        root = math.sqrt(max(r_squared, 0.0))
        r = root if model is Model.QUADRATIC else math.copysign(root, coefficients[1])
    return Fit(
        model=model,
        weighting=weighting,
        coefficients=coefficients,
        std_errors=std_errors,
        covariance=covariance,
        residual_sd=residual_sd,
        dof=dof,
        r_squared=r_squared,
        r=r,
        points=n,
        levels=levels,
        x_low=float(xa.min()),
        x_high=float(xa.max()),
        x_mean=x_mean,
        y_mean=y_mean,
        sxx=sxx,
        weight_sum=wsum,
        weight_floor=floor,
        weight_norm=norm,
        explicit_weights=explicit,
        reading_variance=knots,
    )


def _fit_average_rf(xa: _Array, ya: _Array) -> Fit:
    """Mean response factor over the standards with x > 0."""
    used = xa > 0.0
    xs, ys = xa[used], ya[used]
    n = xs.size
    if n < 1:
        raise ValueError("average_rf needs at least 1 point with x > 0")
    rf = ys / xs
    rf_mean = float(rf.mean())
    dof = n - 1
    residual_sd: float | None = None
    covariance: tuple[tuple[float, ...], ...] | None = None
    std_errors: tuple[float | None, ...] = (None, None)
    rsd: float | None = None
    residuals = ys - rf_mean * xs
    sse = float(residuals @ residuals)
    if dof > 0:
        residual_sd = math.sqrt(sse / dof)
        rf_sd = float(rf.std(ddof=1))
        se = rf_sd / math.sqrt(n)
        std_errors = (0.0, se)
        covariance = ((0.0, 0.0), (0.0, se * se))
        rsd = 100.0 * rf_sd / rf_mean if rf_mean != 0.0 else None
    syy = float(ys @ ys)
    r_squared = 1.0 - sse / syy if syy > 0.0 else None
    r = None if r_squared is None else math.copysign(math.sqrt(max(r_squared, 0.0)), rf_mean)
    x_mean = float(xs.mean())
    return Fit(
        model=Model.AVERAGE_RF,
        weighting=Weighting.NONE,
        coefficients=(0.0, rf_mean),
        std_errors=std_errors,
        covariance=covariance,
        residual_sd=residual_sd,
        dof=dof,
        r_squared=r_squared,
        r=r,
        points=n,
        levels=int(np.unique(xs).size),
        x_low=float(xs.min()),
        x_high=float(xs.max()),
        x_mean=x_mean,
        y_mean=float(ys.mean()),
        sxx=float(((xs - x_mean) ** 2).sum()),
        weight_sum=float(n),
        rf_mean=rf_mean,
        rf_rsd_pct=rsd,
    )


@dataclass(frozen=True, slots=True)
class MandelResult:
    """Mandel's fitting test (ISO 8466-1): is a quadratic significantly better than a line?"""

    statistic: float  # PG = DS² / s², s² the quadratic's or the stated one
    critical: float  # F(1 − alpha; 1, N − 3), or F(1 − alpha; 1, ∞) with a stated variance
    alpha: float
    significant: bool
    # The weighted space of the test: "none", "1/x" or "1/x2" (weights of the rule, floored).
    weighting: str = "none"
    # True when s² came from a stated reading repeatability, not from the residuals.
    stated_variance: bool = False


def f_quantile(probability: float, numerator_dof: float, denominator_dof: float) -> float:
    """The ``probability`` quantile of Snedecor's F; ``math.inf`` denominator dof is χ²/ν₁.

    scipy.special (fdtri, chdtri), imported on first use: a cold ``calwarden
    check`` of a run without a linearity test never pays for importing scipy.
    """
    if not 0.0 < probability < 1.0 or numerator_dof <= 0 or denominator_dof <= 0:
        raise ValueError("probability must be in (0, 1) and the degrees of freedom positive")
    from scipy import special  # lazy: see the docstring

    if math.isinf(denominator_dof):
        return float(special.chdtri(numerator_dof, 1.0 - probability)) / numerator_dof
    return float(special.fdtri(numerator_dof, denominator_dof, probability))


#: A stated repeatability is set aside when the residuals scatter more than this test allows.
_STATED_VARIANCE_CHECK = 0.01


def mandel_test(
    x: Sequence[float],
    y: Sequence[float],
    alpha: float = 0.01,
    weighting: Weighting = Weighting.NONE,
    reading_rsd_pct: float | None = None,
) -> MandelResult | None:
    """Mandel's test in the weighted space ``weighting``; ``None`` with fewer than 4 points.

    ISO 8466-1:1990 §4.1.3 (Mandel 1964): DS² = (N−2)·s²(linear) − (N−3)·s²(quadratic),
    PG = DS²/s²(quadratic), curvature significant when PG > F(1 − alpha; 1, N − 3).
    Also ``None`` when fewer than 3 distinct x leave the quadratic undetermined.

    Weighted: both fits use the weights of the rule (1/x or 1/x², floored at the
    lowest non-zero x, normalised), so s² and DS² are weighted sums of squares
    and PG follows F(1, N − 3) when the weights are 1/variance up to a factor:
    generalised least squares turns the weighted problem into ISO 8466-1's
    homoscedastic one (Draper & Smith, *Applied Regression Analysis*, §9.2 [memory]).

    ``reading_rsd_pct``: a stated repeatability of one reading (from the method's
    validation). s² is then the variance that repeatability gives in the test's
    weighted space, mean of w·(rsd·ŷ)² over the standards, and the critical value
    F(1 − alpha; 1, ∞) (a known variance has infinite degrees of freedom). Six
    standards leave the estimated s² only three degrees of freedom, F(0.99; 1, 3) =
    34.1; a known variance brings the critical value to 6.63, which is what lets the
    test see a 6 % bend at the top against 1 % noise. When the quadratic's
    residuals scatter significantly more than stated (χ² test at 1 %), the
    statement is wrong for this run and the estimated s² is used.
    """
    if len(x) < 4:
        return None
    xa, ya = _as_arrays(x, y)
    if np.unique(xa).size < 3:
        return None
    n = xa.size
    w, _, _ = _rule_weights(xa, weighting) if np.any(xa != 0.0) else (np.ones_like(xa), 0.0, 1.0)
    linear = fit_weighted(xa.tolist(), ya.tolist(), w.tolist(), Model.LINEAR)
    quadratic = fit_weighted(xa.tolist(), ya.tolist(), w.tolist(), Model.QUADRATIC)
    assert linear.residual_sd is not None and quadratic.residual_sd is not None  # dof ≥ 1
    var_quad = quadratic.residual_sd**2
    # Rounding can leave a perfect line's DS² a hair below zero.
    ds2 = max((n - 2) * linear.residual_sd**2 - (n - 3) * var_quad, 0.0)
    variance, dof, stated = var_quad, float(n - 3), False
    if reading_rsd_pct is not None:
        predicted = np.array([linear.predict(v) for v in xa.tolist()])
        known = float(np.mean(w * (reading_rsd_pct / 100.0 * predicted) ** 2))
        bound = f_quantile(1.0 - _STATED_VARIANCE_CHECK, n - 3, math.inf)
        if known > 0.0 and var_quad <= bound * known:
            variance, dof, stated = known, math.inf, True
    # An exact quadratic (s² = 0): curvature is either certain or absent.
    statistic = ds2 / variance if variance > 0.0 else (math.inf if ds2 > 0.0 else 0.0)
    critical = f_quantile(1.0 - alpha, 1, dof)
    return MandelResult(
        statistic=statistic,
        critical=critical,
        alpha=alpha,
        significant=statistic > critical,
        weighting=weighting.value,
        stated_variance=stated,
    )


def relative_standard_error(
    nominal: Sequence[float], back_calculated: Sequence[float], parameters: int
) -> float | None:
    """RSE in percent, US EPA SW-846 Method 8000D; ``None`` when n ≤ p or a nominal is zero.

    RSE = 100 % · sqrt( Σ ((x'ᵢ − xᵢ)/xᵢ)² / (n − p) ), x' back-calculated
    (NELAC Institute, "Calculating RSE", 2017).
    """
    if len(nominal) != len(back_calculated):
        raise ValueError(
            f"nominal and back_calculated differ in length: {len(nominal)}, {len(back_calculated)}"
        )
    n = len(nominal)
    if n <= parameters or any(v == 0.0 for v in nominal):
        return None
    total = math.fsum(((b - a) / a) ** 2 for a, b in zip(nominal, back_calculated, strict=True))
    return 100.0 * math.sqrt(total / (n - parameters))


#: Blank readings needed before their SD replaces the lowest standard's in LOD/LOQ.
MIN_BLANK_REPLICATES = 3


def detection_limits(fit: Fit, blank_responses: Sequence[float] = ()) -> tuple[float, float] | None:
    """(LOD, LOQ) as 3.3·σ/b1 and 10·σ/b1 (ICH Q2(R2) §5.4 [memory]); ``None`` without σ or slope.

    b1 is the linear coefficient (the slope at x = 0 for a quadratic, the mean RF
    for average RF), taken as its magnitude. σ is the SD of a response near zero:

    - unweighted fits: the residual SD s(y/x) (ICH Q2: "the residual standard
      deviation of a regression line"), the same at every level by assumption;
    - weighted fits (1/x, 1/x², explicit weights): a weight says the variance
      changes along the range, so σ is taken at the low end, where LOD and LOQ
      lie. With at least ``MIN_BLANK_REPLICATES`` blank readings, their SD (ICH
      Q2: "based on the standard deviation of the blank"); otherwise the
      residual SD at the lowest non-zero standard, s·sqrt(1/w(x_low)) with w the
      fit's normalised weight. The weighted residual SD s itself is the SD at the
      mean weight and moves with the top of the range (adding high standards to
      the same low ones raised the LOD of a 1/x fit from 0.18 to 1.53).
    """
    if fit.residual_sd is None:
        return None
    slope = abs(fit.coefficients[1])
    if slope == 0.0:
        return None
    sigma = fit.residual_sd
    weighted = fit.weighting is not Weighting.NONE or fit.explicit_weights
    if weighted:
        if len(blank_responses) >= MIN_BLANK_REPLICATES:
            sigma = float(np.std(np.asarray(blank_responses, dtype=np.float64), ddof=1))
        else:
            if fit.explicit_weights:
                x_low = min((abs(v) for v, _ in fit.reading_variance if v != 0.0), default=0.0)
            else:
                x_low = max(fit.weight_floor, abs(fit.x_low))
            sigma = fit.residual_sd * math.sqrt(fit._reading_variance_factor(x_low))
    return 3.3 * sigma / slope, 10.0 * sigma / slope


@dataclass(frozen=True, slots=True)
class AdditionResult:
    """A standard-addition series: the x-intercept's magnitude and its standard deviation."""

    concentration: float  # b0 / b1, in the measured solution
    std_dev: float | None  # s(xE)
    fit: Fit


def standard_addition(added: Sequence[float], response: Sequence[float]) -> AdditionResult:
    """Fit response against added amount (unweighted line) and extrapolate to zero response.

    s(xE) = (s/b)·sqrt(1/n + ȳ²/(b²·Σ(x − x̄)²)) (Miller & Miller, *Statistics and
    Chemometrics for Analytical Chemistry*, ch. 5); ``None`` with no degrees of
    freedom. Raises ``ValueError`` with fewer than 2 points or a zero slope.
    """
    if len(added) < 2:
        raise ValueError(f"standard addition needs at least 2 points, got {len(added)}")
    fit = fit_calibration(added, response, Model.LINEAR)
    b0, b1 = fit.coefficients
    # A slope moving the response by a few ulps over the whole series is rounding, not signal.
    span = abs(b1) * (fit.x_high - fit.x_low)
    if span <= 64.0 * _EPS * max(abs(v) for v in response):
        raise ValueError("standard addition with a zero slope has no intercept")
    std_dev: float | None = None
    if fit.residual_sd is not None:
        std_dev = (fit.residual_sd / abs(b1)) * math.sqrt(
            1.0 / fit.points + fit.y_mean**2 / (b1 * b1 * fit.sxx)
        )
    return AdditionResult(concentration=b0 / b1, std_dev=std_dev, fit=fit)
