"""Certified values of the NIST Statistical Reference Datasets, linear least squares.

Data and certified values: NIST StRD (US government work, public domain), copied
to tests/reference/nist_strd/. Norris and NoInt1 are checked to 12 significant
digits (relative tolerance 1e-12), Pontius, whose x reaches 3e6, to 9 (1e-9).
"""

from __future__ import annotations

import csv
import json
from pathlib import Path
from typing import Any

import pytest

from calwarden.rules.calibration import Fit, Model, fit_calibration

REFERENCE = Path(__file__).parent / "reference" / "nist_strd"
CERTIFIED: dict[str, Any] = json.loads((REFERENCE / "certified.json").read_text("utf-8"))
DIGITS_12 = 1e-12
DIGITS_9 = 1e-9


def _load(name: str) -> tuple[list[float], list[float]]:
    """x and y of one dataset (the files hold y,x as NIST gives them)."""
    with (REFERENCE / f"{name}.csv").open(newline="", encoding="utf-8") as handle:
        rows = list(csv.DictReader(handle))
    return [float(row["x"]) for row in rows], [float(row["y"]) for row in rows]


def _fit(name: str, model: Model) -> Fit:
    x, y = _load(name)
    return fit_calibration(x, y, model)


# NIST StRD, Norris dataset: straight line, 36 points.


def test_norris_coefficients() -> None:
    """NIST StRD, Norris dataset: B0 and B1 to 12 significant digits."""
    fit, cert = _fit("norris", Model.LINEAR), CERTIFIED["norris"]
    assert fit.coefficients == pytest.approx((cert["B0"], cert["B1"]), rel=DIGITS_12)


def test_norris_std_errors() -> None:
    """NIST StRD, Norris dataset: standard deviations of B0 and B1 to 12 digits."""
    fit, cert = _fit("norris", Model.LINEAR), CERTIFIED["norris"]
    assert fit.std_errors == pytest.approx((cert["B0_sd"], cert["B1_sd"]), rel=DIGITS_12)


def test_norris_residual_sd() -> None:
    """NIST StRD, Norris dataset: residual SD to 12 digits, on 34 degrees of freedom."""
    fit, cert = _fit("norris", Model.LINEAR), CERTIFIED["norris"]
    assert fit.residual_sd == pytest.approx(cert["residual_sd"], rel=DIGITS_12)
    assert fit.dof == 34


def test_norris_r_squared() -> None:
    """NIST StRD, Norris dataset: R² to 12 digits."""
    fit, cert = _fit("norris", Model.LINEAR), CERTIFIED["norris"]
    assert fit.r_squared == pytest.approx(cert["r_squared"], rel=DIGITS_12)


# NIST StRD, NoInt1 dataset: line through the origin; NIST certifies the uncentred R².


def test_noint1_coefficient_and_std_error() -> None:
    """NIST StRD, NoInt1 dataset: B1 and its standard deviation to 12 digits, b0 held at 0."""
    fit, cert = _fit("noint1", Model.THROUGH_ZERO), CERTIFIED["noint1"]
    assert fit.coefficients[0] == 0.0
    assert fit.coefficients[1] == pytest.approx(cert["B1"], rel=DIGITS_12)
    assert fit.std_errors[1] == pytest.approx(cert["B1_sd"], rel=DIGITS_12)


def test_noint1_residual_sd() -> None:
    """NIST StRD, NoInt1 dataset: residual SD to 12 digits, on 10 degrees of freedom."""
    fit, cert = _fit("noint1", Model.THROUGH_ZERO), CERTIFIED["noint1"]
    assert fit.residual_sd == pytest.approx(cert["residual_sd"], rel=DIGITS_12)
    assert fit.dof == 10


def test_noint1_uncentred_r_squared() -> None:
    """NIST StRD, NoInt1 dataset: the uncentred R² (1 − SSE/Σy²) to 12 digits."""
    fit, cert = _fit("noint1", Model.THROUGH_ZERO), CERTIFIED["noint1"]
    assert fit.r_squared == pytest.approx(cert["r_squared"], rel=DIGITS_12)


# NIST StRD, Pontius dataset: quadratic with x up to 3e6 (deflection y against load x).


def test_pontius_coefficients() -> None:
    """NIST StRD, Pontius dataset: B0, B1 and B2 to 9 significant digits."""
    fit, cert = _fit("pontius", Model.QUADRATIC), CERTIFIED["pontius"]
    expected = (cert["B0"], cert["B1"], cert["B2"])
    assert fit.coefficients == pytest.approx(expected, rel=DIGITS_9)


def test_pontius_std_errors() -> None:
    """NIST StRD, Pontius dataset: standard deviations of B0, B1 and B2 to 9 digits."""
    fit, cert = _fit("pontius", Model.QUADRATIC), CERTIFIED["pontius"]
    expected = (cert["B0_sd"], cert["B1_sd"], cert["B2_sd"])
    assert fit.std_errors == pytest.approx(expected, rel=DIGITS_9)


def test_pontius_residual_sd() -> None:
    """NIST StRD, Pontius dataset: residual SD to 9 digits, on 37 degrees of freedom."""
    fit, cert = _fit("pontius", Model.QUADRATIC), CERTIFIED["pontius"]
    assert fit.residual_sd == pytest.approx(cert["residual_sd"], rel=DIGITS_9)
    assert fit.dof == 37


def test_pontius_r_squared() -> None:
    """NIST StRD, Pontius dataset: R² to 9 digits."""
    fit, cert = _fit("pontius", Model.QUADRATIC), CERTIFIED["pontius"]
    assert fit.r_squared == pytest.approx(cert["r_squared"], rel=DIGITS_9)
