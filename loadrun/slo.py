"""Per-request SLO thresholds, used for goodput (requests/s that met every SLO)."""

from __future__ import annotations

from dataclasses import dataclass

from loadrun.errors import UsageError
from loadrun.record import Record

SLO_METRICS = ("ttft", "tpot", "itl", "e2e")


@dataclass(frozen=True, slots=True)
class Slo:
    """One threshold in milliseconds. For ``itl`` the request's largest gap is checked."""

    metric: str
    limit_ms: float

    @classmethod
    def parse(cls, text: str) -> Slo:
        """Parse ``METRIC=MILLISECONDS``, e.g. ``ttft=500``."""
        name, sep, value = text.partition("=")
        name = name.strip().lower()
        if not sep or name not in SLO_METRICS:
            raise UsageError(
                f"SLO {text!r}: write METRIC=MILLISECONDS with METRIC one of {', '.join(SLO_METRICS)}"
            )
        try:
            limit = float(value.strip().removesuffix("ms"))
        except ValueError as exc:
            raise UsageError(f"SLO {text!r}: {value!r} is not a number of milliseconds") from exc
        if not limit > 0:
            raise UsageError(f"SLO {text!r}: the limit must be positive")
        return cls(name, limit)

    def met_by(self, record: Record) -> bool:
        limit_ns = self.limit_ms * 1e6
        if self.metric == "ttft":
            value = record.ttft_ns
        elif self.metric == "e2e":
            value = record.e2e_ns
        elif self.metric == "tpot":
            value = record.tpot_ns
            if value is None:  # fewer than two tokens: no time per output token to miss
                return True
        else:
            gaps = record.itl_ns()
            value = max(gaps) if gaps else 0
        return value is not None and value <= limit_ns

    def label(self) -> str:
        return f"{self.metric}<={self.limit_ms:g}ms"
