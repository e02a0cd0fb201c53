"""What a finished capacity search means: fits, limits, the capacity, and advice in words.

- Throughput against concurrency: the Universal Scalability Law (``loadrun.fits``); its
  saturation load (throughput within ``min_gain`` of its peak) is one limit, with a band
  from draws of the fit's covariance.
- Each SLO: its value against load made monotone; where it crosses its limit is another,
  with a band from a bootstrap over the requests within each step.
- The capacity per replica is the lowest limit; the advice gives the operating point with
  headroom, the signal and threshold to scale out on, replicas for a stated peak, what the
  curves predict past the limit, and the cost at the operating point.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, replace
from typing import TYPE_CHECKING, Any

import numpy as np

from loadrun.capacity_steps import (
    CapacitySlo,
    ErrorShareSlo,
    FloatArray,
    PercentileSlo,
    Step,
    StepStats,
    limit_of,
    load_text,
    percentile_of,
    usable_by_load,
)
from loadrun.cost import serving_cost
from loadrun.fits import MonotoneCurve, UslFit, fit_usl, interpolate_log

if TYPE_CHECKING:
    from loadrun.capacity import CapacitySettings

__all__ = ["Analysis"]

PAST_LIMIT_FACTORS = (1.2, 1.5)
BAND = (5.0, 95.0)
"""The uncertainty band is the 5th to 95th percentile of the bootstrap (a 90 % interval)."""


@dataclass(slots=True)
class _Limit:
    kind: str
    """"slo", "saturation" or "errors"."""
    label: str
    load: float
    where: str
    low: float | None = None
    high: float | None = None
    detail: str = ""
    bracket: tuple[float, float] | None = None
    """The measured loads on either side: the highest within the limit below it, the lowest
    past it above (the band covers sampling noise; this, how far apart the steps were)."""

    def to_json(self) -> dict[str, Any]:
        return {
            "kind": self.kind,
            "label": self.label,
            "load": self.load,
            "where": self.where,
            "low": self.low,
            "high": self.high,
            "bracket": list(self.bracket) if self.bracket is not None else None,
            "detail": self.detail,
        }


class Analysis:
    """Fits, limits, capacity, predictions past the limit, advice and cost of a finished search."""

    def __init__(
        self,
        settings: CapacitySettings,
        slos: Sequence[CapacitySlo],
        steps: Sequence[Step],
        end_reason: str,
        saturated_at: float | None,
    ) -> None:
        self.settings = settings
        self.slos = tuple(slos)
        self.all_steps = list(steps)
        self.end_reason = end_reason
        self.saturated_at = saturated_at
        self.steps = usable_by_load(steps)
        self.loads = [s.load for s in self.steps]
        self.rng = np.random.default_rng(self.settings.seed)
        self.closed = settings.axis == "concurrency"
        self.usl_loads: list[float] = []
        self.usl = self._fit_usl()
        self.curves: dict[str, MonotoneCurve] = {}
        self.limits = self._limits()
        self.capacity = self._capacity()
        self.past_limit = self._past_limit()

    # fits ----------------------------------------------------------------------------------
    def _fit_usl(self) -> UslFit | None:
        """On requests in flight: the concurrency of a closed loop, or in an open loop the mean
        in flight by Little's law (throughput x mean latency), where it is at least one."""
        points = []
        for step in self.steps:
            x = step.stats.requests_per_s
            if x <= 0 or step.heavy_errors:
                continue
            if self.closed:
                points.append((step.load, x))
            elif step.stats.mean_e2e_s is not None and x * step.stats.mean_e2e_s >= 1.0:
                points.append((x * step.stats.mean_e2e_s, x))
        self.usl_loads = [p[0] for p in points]
        if len(set(self.usl_loads)) < 3:
            return None
        try:
            return fit_usl(self.usl_loads, [p[1] for p in points])
        except ValueError:
            return None

    def _step_at(self, load: float) -> Step:
        return next(s for s in self.steps if s.load == load)

    def _limits(self) -> list[_Limit]:
        limits: list[_Limit] = []
        if not self.steps:
            return limits
        for slo in self.slos:
            values = [s.slo_values.get(slo.key) for s in self.steps]
            pairs = [(s, v) for s, v in zip(self.steps, values, strict=True) if v is not None]
            if not pairs:
                continue
            weights = [max(1, s.stats.ok) for s, _ in pairs]
            curve = MonotoneCurve([s.load for s, _ in pairs], [float(v) for _, v in pairs], weights)
            self.curves[slo.key] = curve
            crossing = curve.crossing(limit_of(slo))
            assert crossing.load is not None
            limit = _Limit(
                "errors" if isinstance(slo, ErrorShareSlo) else "slo",
                slo.label(),
                crossing.load,
                crossing.where,
            )
            if crossing.where == "within" and isinstance(slo, PercentileSlo):
                limit.low, limit.high = self._crossing_band(slo, [s for s, _ in pairs])
            if crossing.where == "within":
                below = [s.load for s, v in pairs if v <= limit_of(slo) and s.load <= crossing.load]
                above = [s.load for s, v in pairs if v > limit_of(slo) and s.load >= crossing.load]
                if below and above:
                    limit.bracket = (max(below), min(above))
            limits.append(limit)
        saturation = self._saturation_limit()
        if saturation is not None:
            limits.append(saturation)
        return limits

    def _crossing_band(self, slo: PercentileSlo, steps: list[Step]) -> tuple[float | None, float | None]:
        """Bootstrap over the requests within each step (requests, not gaps, for ITL)."""
        replicates = self.settings.bootstrap_replicates
        if replicates < 10:
            return None, None
        per_step = [self._resampled_percentiles(step.stats, slo, replicates) for step in steps]
        loads = [s.load for s in steps]
        weights = [max(1, s.stats.ok) for s in steps]
        crossings = []
        for r in range(replicates):
            curve = MonotoneCurve(loads, [float(values[r]) for values in per_step], weights)
            crossing = curve.crossing(slo.limit_ms)
            assert crossing.load is not None
            crossings.append(crossing.load)
        low, high = np.percentile(crossings, BAND)
        return float(low), float(high)

    def _resampled_percentiles(self, stats: StepStats, slo: PercentileSlo, replicates: int) -> FloatArray:
        values = stats.values.get(slo.metric, np.zeros(0))
        out = np.empty(replicates)
        if values.size == 0:
            out.fill(np.nan)
            return out
        if slo.metric != "itl":
            picks = self.rng.integers(0, values.size, size=(replicates, values.size))
            resampled = values[picks]
            rank = max(1, int(slo.percentile / 100.0 * values.size + 0.5))
            return np.asarray(np.partition(resampled, rank - 1, axis=1)[:, rank - 1], dtype=np.float64)
        counts = stats.gap_counts
        starts = np.concatenate([[0], np.cumsum(counts)[:-1]])
        for r in range(replicates):
            chosen = self.rng.integers(0, counts.size, size=counts.size)
            lengths = counts[chosen]
            total = int(lengths.sum())
            if total == 0:
                out[r] = np.nan
                continue
            shift = np.repeat(starts[chosen] - (np.cumsum(lengths) - lengths), lengths)
            out[r] = percentile_of(values[np.arange(total) + shift], slo.percentile)
        return out

    def _saturation_limit(self) -> _Limit | None:
        """Where throughput comes within ``min_gain`` of its peak, if the search saw it flatten."""
        share = 1.0 - self.settings.min_gain
        max_load = max(self.loads)
        best = max(s.stats.requests_per_s for s in self.steps)
        if self.usl is not None:
            usl = self.usl
            max_n = max(self.usl_loads)
            load = usl.saturation_load(share)
            if load is None or load > max_n:
                return None
            low, high = self._saturation_band(share, max_n)
            if not self.closed:  # from requests in flight to the rate that keeps them in flight
                load = float(usl.predict(load))
                low = float(usl.predict(low)) if low is not None else None
                high = float(usl.predict(high)) if high is not None else None
                if load > max_load:
                    return None
            peak = self.usl.peak_concurrency
            detail = (
                f"the USL fit's throughput reaches {share:.0%} of its peak "
                f"({self.usl.peak_throughput:.1f} requests/s"
                + (f" at N* = {peak:.1f}" if math.isfinite(peak) else ", approached as load grows")
                + ")"
            )
            return _Limit("saturation", "throughput saturation", load, "within", low, high, detail)
        if self.saturated_at is None:
            return None
        knee = min(s.load for s in self.steps if s.stats.requests_per_s >= share * best)
        detail = (
            f"measured throughput within {self.settings.min_gain:.0%} of its best ({best:.1f} requests/s)"
        )
        return _Limit("saturation", "throughput saturation", knee, "within", knee, knee, detail)

    def _saturation_band(self, share: float, max_load: float) -> tuple[float | None, float | None]:
        usl = self.usl
        assert usl is not None
        if usl.covariance is None:
            return None, None
        mean = np.array([usl.lambda_, usl.sigma, usl.kappa])
        draws = self.rng.multivariate_normal(mean, np.array(usl.covariance), size=400, method="svd")
        loads = []
        for lambda_, sigma, kappa in draws:
            if lambda_ <= 0:
                continue
            fit = replace(usl, lambda_=float(lambda_), sigma=min(max(float(sigma), 0.0), 1.0),
                          kappa=min(max(float(kappa), 0.0), 1.0))  # fmt: skip
            load = fit.saturation_load(share)
            loads.append(min(load, max_load) if load is not None else max_load)
        if len(loads) < 10:
            return None, None
        low, high = np.percentile(loads, BAND)
        return float(low), float(high)

    # capacity ------------------------------------------------------------------------------
    def _capacity(self) -> dict[str, Any]:
        base: dict[str, Any] = {"axis": self.settings.axis, "found": False}
        if not self.steps:
            reason = self.end_reason or "no step finished"
            return base | {"concurrency": None, "load": None, "limited_by": "failure", "reason": reason}
        below = [limit for limit in self.limits if limit.where == "below_range"]
        if below:
            first = min(self.loads)
            labels = ", ".join(limit.label for limit in below)
            reason = f"{labels} is broken even at the lowest load tried ({self._text(first)})"
            if any(s.heavy_errors for s in self.steps if s.load == first):
                reason += f"; {self._step_at(first).over[-1]}"
            return base | {
                "concurrency": 0,
                "load": 0.0,
                "limited_by": below[0].label,
                "limit_kind": below[0].kind,
                "reason": reason,
                **self._rates_at(None),
            }
        within = [limit for limit in self.limits if limit.where == "within"]
        if within:
            binding = min(within, key=lambda limit: limit.load)
            # The band of a minimum: the minimum of the lower ends and of the upper ends (a
            # limit without a band counts with its own load at both ends).
            band_low: float | None = None
            band_high: float | None = None
            if any(limit.low is not None and limit.high is not None for limit in within):
                band_low = min(limit.load if limit.low is None else limit.low for limit in within)
                band_high = min(limit.load if limit.high is None else limit.high for limit in within)
            reason = f"{binding.label} is reached at {self._text(binding.load)}"
            if binding.bracket is not None:
                low_step, high_step = binding.bracket
                reason += f" (measured within it at {low_step:g}, past it at {high_step:g})"
            if binding.detail:
                reason += f" ({binding.detail})"
            return base | {
                "found": True,
                "load": binding.load,
                "concurrency": binding.load if self.closed else self._in_flight_at(binding.load),
                "low": band_low,
                "high": band_high,
                "limited_by": binding.label,
                "limit_kind": binding.kind,
                "bracket": list(binding.bracket) if binding.bracket is not None else None,
                "reason": reason,
                **self._rates_at(binding.load),
            }
        highest = max(self.loads)
        return base | {
            "load": highest,
            "concurrency": highest if self.closed else self._in_flight_at(highest),
            "lower_bound": True,
            "limited_by": "search range",
            "limit_kind": "none reached",
            "reason": f"no limit was reached up to {self._text(highest)}: {self.end_reason}",
            **self._rates_at(highest),
        }

    def _rates_at(self, load: float | None) -> dict[str, float | None]:
        keys = ("requests_per_s", "output_tokens_per_s", "input_tokens_per_s")
        if load is None:
            return dict.fromkeys(keys, 0.0)
        return {key: self._throughput_at(load, key) for key in keys}

    def _throughput_at(self, load: float, key: str) -> float | None:
        values = [getattr(s.stats, key) for s in self.steps]
        measured = interpolate_log(self.loads, values, load)
        if measured is not None:
            return measured
        if key == "requests_per_s" and self.usl is not None and self.closed:
            return float(self.usl.predict(load))
        return None

    def _in_flight_at(self, load: float) -> float | None:
        """Mean requests in flight at ``load`` (Little's law per step, interpolated)."""
        pairs = [
            (s.load, s.stats.requests_per_s * s.stats.mean_e2e_s)
            for s in self.steps
            if s.stats.mean_e2e_s is not None
        ]
        if not pairs:
            return None
        return interpolate_log([p[0] for p in pairs], [p[1] for p in pairs], load)

    def _text(self, load: float) -> str:
        return load_text(load, self.settings.axis)

    # past the limit ------------------------------------------------------------------------
    def _past_limit(self) -> list[dict[str, Any]]:
        capacity = self.capacity.get("load")
        if not self.capacity.get("found") or not capacity:
            return []
        out = []
        for factor in PAST_LIMIT_FACTORS:
            load = capacity * factor
            row: dict[str, Any] = {"factor": factor, "load": load, "latency": {}}
            measured_x = interpolate_log(self.loads, [s.stats.requests_per_s for s in self.steps], load)
            row["requests_per_s"] = measured_x
            usl = self.usl if self.closed else None
            row["requests_per_s_usl"] = float(usl.predict(load)) if usl is not None else None
            if usl is not None:
                # Little's law in a closed loop: mean response time = N / X(N).
                row["e2e_mean_ms_usl"] = load / float(usl.predict(load)) * 1000
            for key, curve in self.curves.items():
                value = curve(load)
                source = "measured"
                slo = next(s for s in self.slos if s.key == key)
                if value is None and usl is not None and isinstance(slo, PercentileSlo):
                    value = self._scaled_by_usl(curve, slo, load)
                    source = "usl" if value is not None else "none"
                row["latency"][key] = {"value": value, "source": source, "limit": limit_of(slo)}
            out.append(row)
        return out

    def _scaled_by_usl(self, curve: MonotoneCurve, slo: PercentileSlo, load: float) -> float | None:
        """Queueing metrics (TTFT, E2E) past the measured range, scaled with the response time
        N / X(N) the USL fit implies; per-token gaps are not extrapolated."""
        if slo.metric not in ("ttft", "e2e") or self.usl is None:
            return None
        last = curve.loads[-1]
        response = load / float(self.usl.predict(load))
        response_last = last / float(self.usl.predict(last))
        return curve.values[-1] * response / response_last

    # advice --------------------------------------------------------------------------------
    def _advice(self) -> dict[str, Any]:
        advice = self.settings.advice
        capacity = self.capacity
        lines: list[str] = []
        out: dict[str, Any] = {"headroom": advice.headroom, "lines": lines}
        load = capacity.get("load")
        if not load:
            lines.append(f"No capacity could be established: {capacity.get('reason')}.")
            lines.append(
                "Fix what limited it first (the target's errors, reachability or an SLO that "
                "one request alone cannot meet), then search again."
            )
            return out
        if self.closed:
            operating = max(1.0, math.floor(load * (1.0 - advice.headroom)))
        else:
            operating = float(f"{load * (1.0 - advice.headroom):.3g}")
        x_op = self._throughput_at(operating, "requests_per_s")
        out_tokens_op = self._throughput_at(operating, "output_tokens_per_s")
        in_tokens_op = self._throughput_at(operating, "input_tokens_per_s")
        in_flight_op = operating if self.closed else self._in_flight_at(operating)
        out.update(
            {
                "operating_load": operating,
                "operating_concurrency": in_flight_op,
                "operating_requests_per_s": x_op,
                "operating_output_tokens_per_s": out_tokens_op,
                "operating_input_tokens_per_s": in_tokens_op,
                "scale_out_signal": (
                    "in-flight requests per replica" if self.closed else "requests per second per replica"
                ),
                "scale_out_at": operating,
            }
        )
        band = ""
        if capacity.get("low") is not None and capacity.get("high") is not None:
            band = f" (90 % band {capacity['low']:.3g} to {capacity['high']:.3g})"
        rate = capacity.get("requests_per_s")
        tokens = capacity.get("output_tokens_per_s")
        if self.closed:
            size = f"{load:.1f} requests in flight{band}, about {_num(rate)} requests/s"
            floor = f"{load:g} requests in flight ({_num(rate)} requests/s)"
            point = f"{operating:g} in-flight requests per replica"
            signal = (
                f"in-flight requests per replica stay above {operating:g} "
                f"(or requests/s per replica above {_num(x_op)})"
            )
        else:
            in_flight = self._in_flight_at(load)
            size = f"{load:.3g} requests/s offered{band}, about {_num(in_flight)} requests in flight"
            floor = f"{load:.3g} requests/s offered"
            point = f"{operating:g} requests/s per replica (about {_num(in_flight_op)} in flight)"
            signal = (
                f"requests/s per replica stay above {operating:g} "
                f"(or in-flight requests per replica above {_num(in_flight_op)})"
            )
        if capacity.get("found"):
            lines.append(
                f"Capacity per replica: {size} and {_num(tokens)} output tokens/s. "
                f"Limited by {capacity['limited_by']}."
            )
        else:
            lines.append(
                f"Capacity per replica is at least {floor}: {capacity.get('reason')}. "
                "Search a wider range or with a larger budget for the real limit."
            )
        lines.append(
            f"Operate at up to {point} ({advice.headroom:.0%} headroom): about {_num(x_op)} requests/s "
            f"and {_num(out_tokens_op)} output tokens/s per replica."
        )
        lines.append(
            f"Scale out when {signal}; add the next replica before that, not at the limit of "
            f"{self._text(load)}."
        )
        if advice.peak_requests_per_s is not None and x_op:
            needed = math.ceil(advice.peak_requests_per_s / x_op)
            total = needed + advice.spare_replicas
            out.update(
                {
                    "peak_requests_per_s": advice.peak_requests_per_s,
                    "replicas_for_peak": needed,
                    "spare_replicas": advice.spare_replicas,
                    "replicas_total": total,
                }
            )
            spare = f" + {advice.spare_replicas} spare = {total}" if advice.spare_replicas else ""
            lines.append(
                f"For a peak of {advice.peak_requests_per_s:g} requests/s: {needed} replicas{spare} "
                f"at the operating point."
            )
        for row in self.past_limit:
            parts = []
            for key, item in row["latency"].items():
                if item["value"] is None or key == "errors":
                    continue
                note = "" if item["source"] == "measured" else " (USL extrapolation)"
                parts.append(f"{key.replace('_', ' ')} {item['value']:.1f} ms{note}")
            throughput = row["requests_per_s"] or row["requests_per_s_usl"]
            if parts or throughput:
                lines.append(
                    f"Past the limit, at {row['factor']:g}x ({self._text(row['load'])}): "
                    + (", ".join(parts) + "; " if parts else "")
                    + f"throughput {_num(throughput)} requests/s."
                )
        if self.usl is not None:
            peak = self.usl.peak_concurrency
            lines.append(
                f"Scalability (USL): sigma {self.usl.sigma:.4g} (contention), kappa {self.usl.kappa:.3g} "
                f"(coherency), lambda {self.usl.lambda_:.3g} requests/s per client"
                + (f"; throughput peaks at N* = {peak:.1f}." if math.isfinite(peak) and peak < 1e6 else ".")
            )
        warnings = self._warnings()
        out["warnings"] = warnings
        lines.extend(f"Note: {w}" for w in warnings)
        return out

    def _warnings(self) -> list[str]:
        notes = []
        limited = [s for s in self.all_steps if (s.summary or {}).get("generator", {}).get("limited")]
        if limited:
            loads = ", ".join(f"{s.load:g}" for s in limited)
            notes.append(
                f"the load generator fell behind at concurrency {loads}: latencies there are not trustworthy"
            )
        unsteady = [s for s in self.all_steps if s.failure is None and not s.stats.steady]
        if unsteady:
            loads = ", ".join(f"{s.load:g}" for s in unsteady)
            notes.append(
                f"no steady state was detected at concurrency {loads} (step too short or load unstable)"
            )
        failed = sum(s.stats.failed for s in self.all_steps)
        if failed:
            notes.append(f"{failed} measured requests failed during the search")
        return notes

    def _cost(self, advice: dict[str, Any]) -> dict[str, Any] | None:
        price = self.settings.advice.replica_price
        if price is None or not advice.get("operating_requests_per_s"):
            return None
        replicas = advice.get("replicas_total", 1)
        cost = serving_cost(
            price,
            output_tokens_per_s=advice.get("operating_output_tokens_per_s") or 0.0,
            input_tokens_per_s=advice.get("operating_input_tokens_per_s") or 0.0,
            requests_per_s=advice["operating_requests_per_s"],
            replicas=replicas,
            hosted=self.settings.advice.hosted_prices,
        )
        lines = advice["lines"]
        per_out = cost["per_million_output_tokens"]
        per_all = cost["per_million_tokens"]
        lines.append(
            f"Cost at the operating point (${price.per_hour:g} per replica-hour): "
            + (f"${per_out:.2f} per million output tokens" if per_out is not None else "no output tokens")
            + (f", ${per_all:.2f} per million tokens in and out" if per_all is not None else "")
            + f"; {replicas} replica{'s' if replicas != 1 else ''} cost ${cost['yearly_cost']:,.0f} a year."
        )
        hosted = cost.get("hosted")
        if hosted is not None:
            lines.append(
                f"Break-even with a hosted price of ${hosted['blended_per_million']:.2f} per million tokens "
                f"(this workload's mix): {hosted['break_even_tokens_per_year'] / 1e9:,.1f} billion tokens a "
                f"year; below that volume the hosted API is cheaper."
            )
        return cost

    def to_json(self) -> dict[str, Any]:
        usl = self.usl.as_dict() if self.usl is not None else None
        if usl is not None and self.loads:
            assert self.usl is not None
            top = max(self.loads) * 1.6
            grid = np.exp(np.linspace(0.0, math.log(top), 48))
            usl["curve"] = {
                "loads": [float(v) for v in grid],
                "requests_per_s": [float(v) for v in np.asarray(self.usl.predict(grid))],
            }
        curves = {}
        for key, curve in self.curves.items():
            loads, values = curve.sample()
            curves[key] = {"loads": loads, "values": values}
        advice = self._advice()
        cost = self._cost(advice)
        return {
            "capacity": self.capacity,
            "sigma": self.usl.sigma if self.usl else None,
            "kappa": self.usl.kappa if self.usl else None,
            "lambda": self.usl.lambda_ if self.usl else None,
            "peak_concurrency": usl["peak_concurrency"] if usl else None,
            "fits": {"usl": usl, "latency_curves": curves},
            "limits": [limit.to_json() for limit in self.limits],
            "past_limit": self.past_limit,
            "advice": advice,
            "cost": cost,
        }


def _num(value: float | None) -> str:
    if value is None:
        return "?"
    return f"{value:,.1f}" if value < 1000 else f"{value:,.0f}"
