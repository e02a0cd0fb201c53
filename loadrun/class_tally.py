"""Per request class: answer compliance, verbosity, and requested against achieved input length.

Fed every measured Record as it finishes (cheap: a few additions); its ``summary()`` goes
into the run summary under ``classes``, with totals under ``compliance`` and
``input_lengths``, so that a comparison of targets can put compliance and tokens spent per
answer beside latency.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

from loadrun.record import Outcome, Record


@dataclass(slots=True)
class ClassCounts:
    """The sums behind one class's summary (or, merged, behind the totals)."""

    requests: int = 0
    ok: int = 0
    outcomes: Counter[str] = field(default_factory=Counter)
    output_tokens: int = 0
    checked: int = 0
    compliant: int = 0
    check_notes: Counter[str] = field(default_factory=Counter)
    length_samples: int = 0
    requested_tokens: int = 0
    achieved_tokens: int = 0
    relative_error_sum: float = 0.0
    relative_error_max: float = 0.0
    turns: int = 0

    def add(self, record: Record) -> None:
        self.requests += 1
        self.outcomes[record.outcome.value] += 1
        self.turns = max(self.turns, record.turn + 1)
        if record.outcome is not Outcome.OK:
            return
        self.ok += 1
        self.output_tokens += record.output_tokens
        if record.compliant is not None:
            self.checked += 1
            if record.compliant:
                self.compliant += 1
            elif record.check_note:
                self.check_notes[record.check_note] += 1
        if record.prompt_tokens is not None and record.requested_input_tokens > 0:
            self.length_samples += 1
            self.requested_tokens += record.requested_input_tokens
            self.achieved_tokens += record.prompt_tokens
            error = record.prompt_tokens / record.requested_input_tokens - 1.0
            self.relative_error_sum += error
            self.relative_error_max = max(self.relative_error_max, abs(error))

    def merge(self, other: ClassCounts) -> None:
        self.requests += other.requests
        self.ok += other.ok
        self.outcomes.update(other.outcomes)
        self.output_tokens += other.output_tokens
        self.checked += other.checked
        self.compliant += other.compliant
        self.check_notes.update(other.check_notes)
        self.length_samples += other.length_samples
        self.requested_tokens += other.requested_tokens
        self.achieved_tokens += other.achieved_tokens
        self.relative_error_sum += other.relative_error_sum
        self.relative_error_max = max(self.relative_error_max, other.relative_error_max)
        self.turns = max(self.turns, other.turns)

    def compliance(self) -> dict[str, Any]:
        return {
            "checked": self.checked,
            "compliant": self.compliant,
            "share": self.compliant / self.checked if self.checked else None,
            "top_failures": dict(self.check_notes.most_common(3)),
        }

    def input_lengths(self) -> dict[str, Any]:
        samples = self.length_samples
        return {
            "samples": samples,
            "requested_mean": self.requested_tokens / samples if samples else None,
            "achieved_mean": self.achieved_tokens / samples if samples else None,
            "mean_relative_error": self.relative_error_sum / samples if samples else None,
            "max_relative_error": self.relative_error_max if samples else None,
        }

    @classmethod
    def from_summary(cls, summary: Mapping[str, Any]) -> ClassCounts:
        """The counts rebuilt from their ``summary()`` (sums from means and counts), so that
        shards' summaries can be merged."""
        counts = cls()
        counts.requests = int(summary["requests"])
        counts.ok = int(summary["ok"])
        counts.outcomes.update(summary["by_outcome"])
        counts.output_tokens = round((summary["output_tokens_mean"] or 0.0) * counts.ok)
        counts.turns = int(summary["turns_seen"])
        compliance = summary["compliance"]
        counts.checked = int(compliance["checked"])
        counts.compliant = int(compliance["compliant"])
        counts.check_notes.update(compliance["top_failures"])
        lengths = summary["input_lengths"]
        samples = int(lengths["samples"])
        counts.length_samples = samples
        if samples:
            counts.requested_tokens = round(lengths["requested_mean"] * samples)
            counts.achieved_tokens = round(lengths["achieved_mean"] * samples)
            counts.relative_error_sum = lengths["mean_relative_error"] * samples
            counts.relative_error_max = lengths["max_relative_error"]
        return counts

    def summary(self) -> dict[str, Any]:
        return {
            "requests": self.requests,
            "ok": self.ok,
            "by_outcome": dict(sorted(self.outcomes.items())),
            "output_tokens_mean": self.output_tokens / self.ok if self.ok else None,
            "turns_seen": self.turns,
            "compliance": self.compliance(),
            "input_lengths": self.input_lengths(),
        }


class ClassTally:
    """Counts per request class, over the measured (in-window) requests."""

    def __init__(self) -> None:
        self._by_class: dict[str, ClassCounts] = {}

    def add(self, record: Record) -> None:
        if not record.in_window:
            return
        tally = self._by_class.get(record.request_class)
        if tally is None:
            tally = self._by_class[record.request_class] = ClassCounts()
        tally.add(record)

    def summary(self) -> dict[str, Any]:
        """``classes`` (per class), ``compliance`` and ``input_lengths`` (over all classes)."""
        return _summary_of(self._by_class)


def merge_class_summaries(parts: Sequence[Mapping[str, Any]]) -> dict[str, Any]:
    """The ``summary()`` of several runs' ``classes`` sections together (a split run's shards)."""
    by_class: dict[str, ClassCounts] = {}
    for classes in parts:
        for name, summary in classes.items():
            by_class.setdefault(name, ClassCounts()).merge(ClassCounts.from_summary(summary))
    return _summary_of(by_class)


def _summary_of(by_class: Mapping[str, ClassCounts]) -> dict[str, Any]:
    total = ClassCounts()
    for counts in by_class.values():
        total.merge(counts)
    return {
        "classes": {name: by_class[name].summary() for name in sorted(by_class)},
        "compliance": total.compliance(),
        "input_lengths": total.input_lengths(),
    }
