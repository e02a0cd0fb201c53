"""Curves fitted to the load steps of a capacity search.

- Throughput against concurrency: the Universal Scalability Law (N. J. Gunther, *Guerrilla
  Capacity Planning*, 2007, eq. 4.31)

      X(N) = lambda * N / (1 + sigma * (N - 1) + kappa * N * (N - 1))

  fitted by bounded least squares (lambda >= 0, 0 <= sigma <= 1, 0 <= kappa <= 1), with
  standard errors from the Jacobian at the optimum, ``s^2 (J^T J)^-1``, the Gauss-Newton
  covariance that nonlinear least-squares packages report. The peak is at
  N* = sqrt((1 - sigma) / kappa).
- Latency against load: measured percentiles made non-decreasing by weighted isotonic
  regression (pool adjacent violators) and joined by a monotone cubic (PCHIP, Fritsch and
  Carlson 1980) over log load, so that a limit is crossed exactly once; ``crossing`` gives
  the load at which it is.
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np
import numpy.typing as npt
from scipy.interpolate import PchipInterpolator
from scipy.optimize import brentq, least_squares, nnls

__all__ = [
    "Crossing",
    "MonotoneCurve",
    "UslFit",
    "fit_usl",
    "interpolate_log",
    "isotonic_increasing",
    "usl_throughput",
]

FloatArray = npt.NDArray[np.float64]

# The parameters differ by orders of magnitude (lambda ~ 1e3, kappa ~ 1e-4); the fit runs on
# parameters divided by these floors or by the previous estimate, whichever is larger, so
# that the solver's tolerances mean the same for each of them.
_SCALE_FLOOR = np.array([1e-12, 1e-9, 1e-12])
_POLISH_ROUNDS = 3


def usl_throughput(
    concurrency: float | FloatArray, lambda_: float, sigma: float, kappa: float
) -> float | FloatArray:
    """X(N) of the Universal Scalability Law."""
    n = concurrency
    return lambda_ * n / (1.0 + sigma * (n - 1.0) + kappa * n * (n - 1.0))


@dataclass(frozen=True, slots=True)
class UslFit:
    lambda_: float
    sigma: float
    kappa: float
    covariance: tuple[tuple[float, ...], ...] | None
    """3x3 covariance of (lambda, sigma, kappa); None with no residual degrees of freedom."""
    residual_se: float | None
    dof: int
    points: int

    def predict(self, concurrency: float | FloatArray) -> float | FloatArray:
        return usl_throughput(concurrency, self.lambda_, self.sigma, self.kappa)

    def _se(self, index: int) -> float | None:
        if self.covariance is None:
            return None
        return math.sqrt(max(0.0, self.covariance[index][index]))

    @property
    def lambda_se(self) -> float | None:
        return self._se(0)

    @property
    def sigma_se(self) -> float | None:
        return self._se(1)

    @property
    def kappa_se(self) -> float | None:
        return self._se(2)

    @property
    def peak_concurrency(self) -> float:
        """N* = sqrt((1 - sigma) / kappa); infinite when kappa is 0 (no retrograde region)."""
        if self.kappa <= 0.0:
            return math.inf
        return math.sqrt(max(0.0, 1.0 - self.sigma) / self.kappa)

    @property
    def peak_concurrency_se(self) -> float | None:
        """Standard error of N* by the delta method."""
        peak = self.peak_concurrency
        if self.covariance is None or not math.isfinite(peak) or peak <= 0.0:
            return None
        # dN*/dsigma = -1 / (2 kappa N*), dN*/dkappa = -N* / (2 kappa)
        gradient = np.array([0.0, -1.0 / (2.0 * self.kappa * peak), -peak / (2.0 * self.kappa)])
        variance = float(gradient @ np.array(self.covariance) @ gradient)
        return math.sqrt(max(0.0, variance))

    @property
    def peak_throughput(self) -> float:
        """The most throughput the curve reaches for N >= 1 (lambda / sigma as N grows, if kappa = 0)."""
        peak = self.peak_concurrency
        if math.isfinite(peak):
            return float(self.predict(max(1.0, peak)))
        if self.sigma > 0.0:
            return self.lambda_ / self.sigma
        return math.inf

    def saturation_load(self, share: float = 0.95) -> float | None:
        """The smallest N >= 1 at which X(N) reaches ``share`` of the peak; None if it never does.

        Solves lambda N = s Xp (1 + sigma (N - 1) + kappa N (N - 1)), a quadratic in N whose
        smaller root is the answer.
        """
        if not 0.0 < share <= 1.0:
            raise ValueError("share must be in (0, 1]")
        peak_x = self.peak_throughput
        if not math.isfinite(peak_x) or peak_x <= 0.0:
            return None
        target = share * peak_x
        if float(self.predict(1.0)) >= target:
            return 1.0
        a = target * self.kappa
        b = target * (self.sigma - self.kappa) - self.lambda_
        c = target * (1.0 - self.sigma)
        if a == 0.0:
            return -c / b if b < 0.0 else None
        discriminant = b * b - 4.0 * a * c
        if discriminant < 0.0:  # only at share 1 by rounding: the peak itself
            return self.peak_concurrency
        # The smaller root, in the form that does not cancel when a is tiny (kappa near 0).
        return max(1.0, 2.0 * c / (-b + math.sqrt(discriminant)))

    def as_dict(self) -> dict[str, Any]:
        peak = self.peak_concurrency
        return {
            "lambda": self.lambda_,
            "sigma": self.sigma,
            "kappa": self.kappa,
            "lambda_se": self.lambda_se,
            "sigma_se": self.sigma_se,
            "kappa_se": self.kappa_se,
            "peak_concurrency": peak if math.isfinite(peak) else None,
            "peak_concurrency_se": self.peak_concurrency_se,
            "peak_throughput": self.peak_throughput if math.isfinite(self.peak_throughput) else None,
            "residual_se": self.residual_se,
            "dof": self.dof,
            "points": self.points,
        }


def fit_usl(concurrency: Sequence[float], throughput: Sequence[float]) -> UslFit:
    """Fit the Universal Scalability Law; lambda is free, not pinned to X(1).

    Needs at least three distinct loads; standard errors need a fourth point.
    """
    n = np.asarray(concurrency, dtype=np.float64)
    x = np.asarray(throughput, dtype=np.float64)
    if n.shape != x.shape or n.ndim != 1:
        raise ValueError("concurrency and throughput must be sequences of the same length")
    if np.unique(n).size < 3:
        raise ValueError("the fit needs throughput at three or more distinct loads")
    if np.any(n < 1.0) or np.any(x <= 0.0) or not np.all(np.isfinite(x)):
        raise ValueError("loads must be >= 1 and throughputs positive")

    params = _initial_guess(n, x)
    upper = np.array([np.inf, 1.0, 1.0])

    def residuals(scaled: FloatArray, scale: FloatArray) -> FloatArray:
        lambda_, sigma, kappa = scaled * scale
        return np.asarray(usl_throughput(n, lambda_, sigma, kappa), dtype=np.float64) - x

    def scaled_jacobian(scaled: FloatArray, scale: FloatArray) -> FloatArray:
        return _usl_jacobian(n, scaled * scale) * scale

    for _ in range(_POLISH_ROUNDS):
        scale = np.maximum(np.abs(params), _SCALE_FLOOR)
        result = least_squares(
            residuals,
            params / scale,
            jac=scaled_jacobian,
            args=(scale,),
            bounds=(np.zeros(3), upper / scale),
            method="trf",
            xtol=1e-15,
            ftol=1e-15,
            gtol=1e-15,
            max_nfev=10_000,
        )
        params = np.asarray(result.x, dtype=np.float64) * scale
    jacobian = _usl_jacobian(n, params)
    dof = n.size - 3
    covariance: tuple[tuple[float, ...], ...] | None = None
    residual_se: float | None = None
    if dof > 0:
        s2 = float(np.sum(np.asarray(result.fun) ** 2)) / dof
        residual_se = math.sqrt(s2)
        try:
            matrix = np.linalg.inv(jacobian.T @ jacobian) * s2
            covariance = tuple(tuple(float(v) for v in row) for row in matrix)
        except np.linalg.LinAlgError:
            covariance = None
    lambda_, sigma, kappa = (float(v) for v in params)
    return UslFit(lambda_, sigma, kappa, covariance, residual_se, dof, int(n.size))


def _usl_jacobian(n: FloatArray, params: FloatArray) -> FloatArray:
    """Partial derivatives of X(N) by lambda, sigma and kappa, one row per load."""
    lambda_, sigma, kappa = params
    denominator = 1.0 + sigma * (n - 1.0) + kappa * n * (n - 1.0)
    by_sigma = -lambda_ * n * (n - 1.0) / denominator**2
    return np.column_stack([n / denominator, by_sigma, by_sigma * n])


def _initial_guess(n: FloatArray, x: FloatArray) -> FloatArray:
    """lambda from the best per-client rate; sigma, kappa from the linearised law (N lambda / X - 1
    = sigma (N - 1) + kappa N (N - 1)) by non-negative least squares."""
    lambda_0 = float(np.max(x / n))
    design = np.column_stack([n - 1.0, n * (n - 1.0)])
    (sigma_0, kappa_0), _ = nnls(design, n * lambda_0 / x - 1.0)
    return np.array([lambda_0, min(max(sigma_0, 1e-6), 1.0), min(max(kappa_0, 1e-9), 1.0)])


# --- latency against load -------------------------------------------------------------------


def isotonic_increasing(values: Sequence[float], weights: Sequence[float] | None = None) -> list[float]:
    """The non-decreasing sequence closest to ``values`` in weighted least squares (PAVA)."""
    w = [1.0] * len(values) if weights is None else [float(v) for v in weights]
    if len(w) != len(values):
        raise ValueError("values and weights differ in length")
    blocks: list[list[float]] = []  # [mean, weight, length]
    for value, weight in zip(values, w, strict=True):
        blocks.append([float(value), max(weight, 1e-12), 1.0])
        while len(blocks) > 1 and blocks[-2][0] > blocks[-1][0]:
            mean_b, weight_b, length_b = blocks.pop()
            mean_a, weight_a, length_a = blocks[-1]
            total = weight_a + weight_b
            blocks[-1] = [(mean_a * weight_a + mean_b * weight_b) / total, total, length_a + length_b]
    out: list[float] = []
    for mean, _weight, length in blocks:
        out.extend([mean] * int(length))
    return out


@dataclass(frozen=True, slots=True)
class Crossing:
    """Where a monotone curve reaches a limit within the measured loads."""

    load: float | None
    """The crossing load when ``where`` is "within"; else the range end it lies beyond."""
    where: Literal["within", "below_range", "above_range"]


class MonotoneCurve:
    """A non-decreasing curve through (load, value) points, monotone cubic over log load."""

    def __init__(
        self, loads: Sequence[float], values: Sequence[float], weights: Sequence[float] | None = None
    ) -> None:
        if len(loads) != len(values) or not loads:
            raise ValueError("need one value per load, and at least one load")
        order = sorted(range(len(loads)), key=lambda i: loads[i])
        xs = [float(loads[i]) for i in order]
        if xs[0] <= 0.0 or any(b <= a for a, b in itertools.pairwise(xs)):
            raise ValueError("loads must be positive and distinct")
        ws = None if weights is None else [float(weights[i]) for i in order]
        self.loads: tuple[float, ...] = tuple(xs)
        self.raw: tuple[float, ...] = tuple(float(values[i]) for i in order)
        self.values: tuple[float, ...] = tuple(isotonic_increasing(self.raw, ws))
        self._log_loads = np.log(np.array(xs))
        self._interp = (
            PchipInterpolator(self._log_loads, np.array(self.values), extrapolate=False)
            if len(xs) > 1
            else None
        )

    def __call__(self, load: float) -> float | None:
        """The curve at ``load``; None outside the measured range."""
        if not self.loads[0] <= load <= self.loads[-1]:
            return None
        if self._interp is None:
            return self.values[0]
        return float(self._interp(math.log(load)))

    def crossing(self, limit: float) -> Crossing:
        """The largest load up to which the curve stays at or below ``limit``.

        "below_range" when even the first point is above it, "above_range" when no point is.
        """
        values = self.values
        if values[0] > limit:
            return Crossing(self.loads[0], "below_range")
        first = next((i for i, v in enumerate(values) if v > limit), None)
        if first is None:
            return Crossing(self.loads[-1], "above_range")
        assert self._interp is not None
        interp = self._interp
        lo, hi = self._log_loads[first - 1], self._log_loads[first]
        root = brentq(lambda u: float(interp(u)) - limit, lo, hi, xtol=1e-12)
        return Crossing(math.exp(float(root)), "within")

    def sample(self, count: int = 48) -> tuple[list[float], list[float]]:
        """Points along the curve (log-spaced loads) for plots and reports."""
        if len(self.loads) == 1:
            return [self.loads[0]], [self.values[0]]
        grid = np.exp(np.linspace(self._log_loads[0], self._log_loads[-1], count))
        assert self._interp is not None
        return [float(v) for v in grid], [float(v) for v in self._interp(np.log(grid))]


def interpolate_log(loads: Sequence[float], values: Sequence[float], at: float) -> float | None:
    """PCHIP through the points over log load, at ``at``; None outside the measured range."""
    pairs = sorted(zip(loads, values, strict=True))
    xs = [float(p[0]) for p in pairs]
    if not xs or not xs[0] <= at <= xs[-1]:
        return None
    if len(xs) == 1:
        return float(pairs[0][1])
    interp = PchipInterpolator(np.log(np.array(xs)), np.array([float(p[1]) for p in pairs]))
    return float(interp(math.log(at)))
