"""Calibration maths: least-squares fits, inverse prediction, standard addition.

Pure numerics on plain sequences of floats: no run, no criteria, no I/O.
Every fit is solved on a centred and scaled x by QR (never normal equations),
so the NIST StRD certified values are reproduced to 12 (Norris, NoInt1) and
9 (Pontius, x up to 3e6) significant digits; see tests/test_nist_strd.py.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from enum import StrEnum


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


@dataclass(frozen=True, slots=True)
class Fit:
    """A fitted calibration and how far it can be trusted.

    ``coefficients`` are in ascending powers, always three long for a quadratic
    and two otherwise (b0 is 0.0 for a fit through zero and for average RF).
    ``covariance`` is ``None`` when there are no residual degrees of freedom.
    """

    model: Model
    weighting: Weighting
    coefficients: tuple[float, ...]
    std_errors: tuple[float | None, ...]
    covariance: tuple[tuple[float, ...], ...] | None
    residual_sd: float | None  # s(y/x); weighted residual SD when weighted
    dof: int
    r_squared: float | None  # uncentred for through-zero (as NIST certifies); weighted R² when weighted
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

    def predict(self, x: float) -> float:
        """Response the model expects at concentration ``x``."""
        raise NotImplementedError

    def invert(self, y: float) -> float | None:
        """Concentration giving response ``y``; for a quadratic the root on the calibrated branch.

        ``None`` when no real concentration gives ``y`` (a quadratic's vertex lies between).
        """
        raise NotImplementedError

    def inverse_uncertainty(self, y: float, replicates: int = 1) -> float | None:
        """Standard uncertainty of :meth:`invert` from the calibration alone.

        Unweighted straight line: the textbook s(x0). Otherwise first-order
        propagation through the covariance plus the new reading's own variance.
        ``None`` when the fit has no degrees of freedom.
        """
        raise NotImplementedError


def fit_calibration(
    x: Sequence[float],
    y: Sequence[float],
    model: Model = Model.LINEAR,
    weighting: Weighting = Weighting.NONE,
) -> Fit:
    """Fit ``y`` against ``x`` with the given model and weighting.

    Raises ``ValueError`` when the points cannot determine the model (fewer
    points than parameters, all x equal).
    """
    raise NotImplementedError


def fit_weighted(
    x: Sequence[float], y: Sequence[float], weights: Sequence[float], model: Model = Model.LINEAR
) -> Fit:
    """Fit with explicit weights (1/s² of each point, say)."""
    raise NotImplementedError


@dataclass(frozen=True, slots=True)
class MandelResult:
    """Mandel's fitting test (ISO 8466-1): is a quadratic significantly better than a line?"""

    statistic: float  # PG = DS² / s²(quadratic)
    critical: float  # F(1 − alpha; 1, N − 3)
    alpha: float
    significant: bool


def mandel_test(x: Sequence[float], y: Sequence[float], alpha: float = 0.01) -> MandelResult | None:
    """Mandel's test on unweighted fits; ``None`` with fewer than 4 points."""
    raise NotImplementedError


def relative_standard_error(
    nominal: Sequence[float], back_calculated: Sequence[float], parameters: int
) -> float | None:
    """RSE in percent, US EPA SW-846 Method 8000D; ``None`` when n ≤ p or a nominal is zero."""
    raise NotImplementedError


def detection_limits(fit: Fit) -> tuple[float, float] | None:
    """(LOD, LOQ) as 3.3·s/b1 and 10·s/b1 (ICH Q2(R2)); ``None`` without s or slope."""
    raise NotImplementedError


@dataclass(frozen=True, slots=True)
class AdditionResult:
    """A standard-addition series: the x-intercept's magnitude and its standard deviation."""

    concentration: float  # b0 / b1, in the measured solution
    std_dev: float | None  # s(xE)
    fit: Fit


def standard_addition(added: Sequence[float], response: Sequence[float]) -> AdditionResult:
    """Fit response against added amount (unweighted line) and extrapolate to zero response."""
    raise NotImplementedError
