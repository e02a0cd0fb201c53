"""The Universal Scalability Law fit against published coefficients.

Model and fitting rules: N. J. Gunther, *Guerrilla Capacity Planning*, 2007, eq. 4.31
(bounded least squares, lambda free). Data sets and published fits as in SOURCES.md
section 1; each test names its source.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from loadrun.fits import fit_usl, usl_throughput

CISCO_THROUGHPUT = [
    955.16, 1878.91, 2688.01, 3548.68, 4315.54, 5130.43, 5931.37, 6531.08, 7219.8, 7867.61,
    8278.71, 8646.7, 9047.84, 9426.55, 9645.37, 9897.24, 10097.6, 10240.5, 10532.39, 10798.52,
    11151.43, 11518.63, 11806, 12089.37, 12075.41, 12177.29, 12211.41, 12158.93, 12155.27,
    12118.04, 12140.4, 12074.39,
]  # fmt: skip


def test_spec_sdm91_sparccenter_2000() -> None:
    """SPEC SDM91 on a Sun SPARCcenter 2000 (Gunther 2007; data set ``specsdm91`` of the R
    package ``usl``, whose test outputs publish this fit): coefficients, standard errors,
    residual standard error, peak and fitted values."""
    loads = [1, 18, 36, 72, 108, 144, 216]
    fit = fit_usl(loads, [64.9, 995.9, 1652.4, 1853.2, 1828.9, 1775.0, 1702.2])
    assert f"{fit.sigma:.3e}" == "2.773e-02"
    assert f"{fit.kappa:.3e}" == "1.044e-04"
    assert fit.lambda_ == pytest.approx(89.995, abs=5e-4)
    assert fit.sigma_se is not None and f"{fit.sigma_se:.3e}" == "9.122e-03"
    assert fit.kappa_se is not None and f"{fit.kappa_se:.3e}" == "1.988e-05"
    assert fit.residual_se is not None and fit.residual_se == pytest.approx(82.85, abs=5e-3)
    assert fit.dof == 4
    assert fit.peak_concurrency == pytest.approx(96.51956, abs=5e-5)
    assert fit.peak_throughput == pytest.approx(1884, abs=1)
    fitted = np.rint(np.asarray(fit.predict(np.array(loads, dtype=float))))
    assert fitted.tolist() == [90, 1078, 1541, 1850, 1879, 1822, 1646]


def test_ray_tracer_first_six_rows() -> None:
    """Ray tracer benchmark, first 6 rows (Gunther 2007; R package ``usl`` test outputs)."""
    fit = fit_usl([1, 4, 8, 12, 16, 20], [20, 78, 130, 170, 190, 200])
    assert fit.sigma == pytest.approx(0.02444, abs=5e-6)
    assert fit.kappa == pytest.approx(0.00163, abs=5e-6)
    assert fit.lambda_ == pytest.approx(20.85605, abs=5e-6)


def test_cisco_router() -> None:
    """Cisco router benchmark (B. Schwartz, *Practical Scalability Analysis with the Universal
    Scalability Law*, 2015; the values the Java library usl4j tests against, 0.02 %)."""
    fit = fit_usl(list(range(1, 33)), CISCO_THROUGHPUT)
    assert fit.sigma == pytest.approx(0.02671591, rel=2e-4)
    assert fit.kappa == pytest.approx(7.690945e-04, rel=2e-4)
    assert fit.lambda_ == pytest.approx(995.6486, rel=2e-4)
    assert fit.peak_concurrency == pytest.approx(35.57, abs=5e-3)
    assert fit.predict(20.0) == pytest.approx(11063.633, rel=2e-4)
    assert fit.predict(35.0) == pytest.approx(12341.746, rel=2e-4)


def test_exact_synthetic_set() -> None:
    """Exact synthetic set (R package ``usl``, tests): sigma 0.02, kappa 0.02, lambda 1.00, N* 7.0."""
    fit = fit_usl([1, 2, 4, 6, 8, 10], [1, 1.8868, 3.0769, 3.5294, 3.5398, 3.3557])
    assert fit.sigma == pytest.approx(0.02, abs=5e-5)
    assert fit.kappa == pytest.approx(0.02, abs=5e-5)
    assert fit.lambda_ == pytest.approx(1.00, abs=5e-5)
    assert fit.peak_concurrency == pytest.approx(7.0, abs=5e-3)


def test_noise_free_points_give_back_their_parameters() -> None:
    """Self-consistency: throughput computed from known parameters fits back to them."""
    loads = np.array([1, 2, 4, 8, 16, 32, 64], dtype=float)
    fit = fit_usl(loads.tolist(), np.asarray(usl_throughput(loads, 12.0, 0.05, 0.0003)).tolist())
    assert (fit.lambda_, fit.sigma, fit.kappa) == pytest.approx((12.0, 0.05, 0.0003), rel=1e-6)
    assert fit.residual_se == pytest.approx(0.0, abs=1e-6)


def test_amdahl_curve_has_no_peak_but_saturates() -> None:
    """kappa = 0: no retrograde region, X approaches lambda / sigma (Amdahl's law)."""
    loads = np.array([1, 2, 4, 8, 16, 32, 64, 128], dtype=float)
    fit = fit_usl(loads.tolist(), np.asarray(usl_throughput(loads, 10.0, 0.1, 0.0)).tolist())
    assert fit.kappa == pytest.approx(0.0, abs=1e-9)
    assert fit.peak_concurrency > 1e3 or math.isinf(fit.peak_concurrency)
    assert fit.peak_throughput == pytest.approx(100.0, rel=1e-3)
    # 95 % of lambda / sigma: N / (1 + 0.1 (N - 1)) = 9.5  ->  N = 8.55 / 0.05 = 171
    saturation = fit.saturation_load(0.95)
    assert saturation is not None and saturation == pytest.approx(171.0, rel=1e-3)


def test_saturation_load_lies_before_the_peak() -> None:
    loads = np.array([1, 2, 4, 6, 8, 10], dtype=float)
    fit = fit_usl(loads.tolist(), np.asarray(usl_throughput(loads, 1.0, 0.02, 0.02)).tolist())
    saturation = fit.saturation_load(0.95)
    assert saturation is not None and 1.0 < saturation < fit.peak_concurrency
    assert fit.predict(saturation) == pytest.approx(0.95 * fit.peak_throughput, rel=1e-9)
    assert fit.saturation_load(1.0) == pytest.approx(fit.peak_concurrency, rel=1e-6)


def test_peak_standard_error_by_the_delta_method_matches_a_numeric_gradient() -> None:
    fit = fit_usl([1, 18, 36, 72, 108, 144, 216], [64.9, 995.9, 1652.4, 1853.2, 1828.9, 1775.0, 1702.2])
    assert fit.covariance is not None and fit.peak_concurrency_se is not None

    def peak(sigma: float, kappa: float) -> float:
        return math.sqrt((1 - sigma) / kappa)

    h_s, h_k = 1e-7, 1e-10
    gradient = np.array(
        [
            0.0,
            (peak(fit.sigma + h_s, fit.kappa) - peak(fit.sigma - h_s, fit.kappa)) / (2 * h_s),
            (peak(fit.sigma, fit.kappa + h_k) - peak(fit.sigma, fit.kappa - h_k)) / (2 * h_k),
        ]
    )
    expected = math.sqrt(gradient @ np.array(fit.covariance) @ gradient)
    assert fit.peak_concurrency_se == pytest.approx(expected, rel=1e-4)


def test_too_few_loads_is_an_error() -> None:
    with pytest.raises(ValueError, match="three or more"):
        fit_usl([1, 2, 2], [1.0, 2.0, 2.1])
    with pytest.raises(ValueError, match="positive"):
        fit_usl([1, 2, 4], [1.0, 0.0, 2.0])


def test_three_points_fit_without_standard_errors() -> None:
    fit = fit_usl([1, 4, 16], np.asarray(usl_throughput(np.array([1.0, 4.0, 16.0]), 5, 0.1, 0.01)).tolist())
    assert fit.dof == 0 and fit.sigma_se is None and fit.residual_se is None
    assert fit.sigma == pytest.approx(0.1, rel=1e-5)
