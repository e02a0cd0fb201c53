"""Prompt synthesis to a target token count, and learning how the target counts tokens.

No tokenizer is bundled: every model tokenizes differently. Prompts are made of words from
an invented vocabulary, and the target is asked how long they are: a short calibration
probe sends a few one-token requests of known word and message counts and reads the
``usage.prompt_tokens`` the target reports. A linear fit

    prompt tokens = per_request + per_message * messages + per_word * words

learned from the probe (three sizes, then a check at the workload's typical length that
adjusts the fit) turns a requested input length into a word count. Requested and achieved
lengths are both recorded on every request, so the fit's accuracy is visible in the results.
"""

from __future__ import annotations

import random
from collections.abc import Awaitable, Callable, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from loadrun.protocol import ChatRequest
from loadrun.record import Record

# Made-up syllables; words built from them belong to no language.
_SYLLABLES = (
    "ka",
    "lo",
    "mi",
    "ter",
    "van",
    "su",
    "rel",
    "dox",
    "pa",
    "quin",
    "bo",
    "zef",
    "ni",
    "ulm",
    "ra",
    "tesh",
    "go",
    "vy",
    "lan",
    "mur",
)


def word_list(size: int = 512, seed: int = 7) -> list[str]:
    rng = random.Random(seed)
    words: set[str] = set()
    while len(words) < size:
        words.add("".join(rng.choice(_SYLLABLES) for _ in range(rng.randint(2, 3))))
    return sorted(words)


_WORDS = word_list()


def synthesize(words: int, rng: random.Random) -> str:
    """``words`` space-separated invented words, drawn with ``rng`` (deterministic per seed)."""
    return " ".join(rng.choices(_WORDS, k=max(1, words)))


def count_words(messages: Sequence[dict[str, Any]]) -> int:
    """Whitespace-separated words over all string contents (text parts of lists too)."""
    total = 0
    for message in messages:
        content = message.get("content")
        if isinstance(content, str):
            total += len(content.split())
        elif isinstance(content, list):
            for part in content:
                if isinstance(part, dict) and isinstance(part.get("text"), str):
                    total += len(part["text"].split())
    return total


@dataclass(frozen=True, slots=True)
class TokenFit:
    """How the target counts the tokens of a prompt of our words (see the module docstring)."""

    per_word: float = 1.0
    per_message: float = 0.0
    per_request: float = 0.0
    source: str = "assumed: one token per word"

    def tokens(self, words: int, messages: int) -> float:
        return self.per_request + self.per_message * messages + self.per_word * words

    def predict(self, messages: Sequence[dict[str, Any]]) -> int:
        """The prompt tokens the target is expected to report for ``messages``."""
        return max(1, round(self.tokens(count_words(messages), len(messages))))

    def words_for(self, tokens: float, messages: int, other_words: int) -> int:
        """Words of new text so that a prompt of ``messages`` messages, ``other_words`` of
        which are already there, comes to ``tokens``; at least one word."""
        room = tokens - self.tokens(other_words, messages)
        return max(1, round(room / self.per_word))

    def describe(self) -> dict[str, Any]:
        return {
            "per_word": round(self.per_word, 6),
            "per_message": round(self.per_message, 6),
            "per_request": round(self.per_request, 6),
            "source": self.source,
        }


ONE_TOKEN_PER_WORD = TokenFit()

PROBE_SHAPES: tuple[tuple[int, ...], ...] = ((32,), (256,), (16, 16))
"""Word counts per message of the first probes: two lengths for the per-word cost, and the
shorter length split over two messages for the per-message cost."""
CHECK_PROBE_LIMIT = 6000
"""The check probe aims at the typical input length, but at most this many tokens."""


@dataclass(slots=True)
class Calibration:
    """The probe's outcome: the fit, and every probe request with what the target reported."""

    fit: TokenFit
    probes: list[dict[str, Any]] = field(default_factory=list)
    note: str = ""

    def describe(self) -> dict[str, Any]:
        return {"fit": self.fit.describe(), "probes": self.probes, "note": self.note}


Execute = Callable[[ChatRequest, Record], Awaitable[Record]]


def probe_request(word_counts: Sequence[int], rng: random.Random) -> ChatRequest:
    """A one-token, unstreamed request whose messages have the given word counts."""
    messages: list[dict[str, Any]] = []
    for position, words in enumerate(word_counts):
        role = "system" if position < len(word_counts) - 1 else "user"
        messages.append({"role": role, "content": synthesize(words, rng)})
    return ChatRequest(messages=tuple(messages), max_tokens=1, stream=False)


async def calibrate_tokens(
    execute: Execute, typical_tokens: float, seed: int, context_window: int | None = None
) -> Calibration:
    """Learn the target's TokenFit from a short probe; falls back to one token per word."""
    rng = random.Random(f"{seed}:calibration")
    rows: list[tuple[int, int, int]] = []  # (messages, words, reported tokens)
    probes: list[dict[str, Any]] = []

    async def probe(word_counts: Sequence[int]) -> str | None:
        request = probe_request(word_counts, rng)
        record = await execute(request, Record(request_id=-(len(probes) + 1), intended_ns=0))
        entry: dict[str, Any] = {
            "messages": len(word_counts),
            "words": sum(word_counts),
            "prompt_tokens": record.prompt_tokens,
            "outcome": record.outcome.value,
        }
        probes.append(entry)
        if not record.ok:
            return f"a calibration probe failed ({record.outcome.value}: {record.error})"
        if record.prompt_tokens is None:
            return "the target reports no usage.prompt_tokens"
        rows.append((len(word_counts), sum(word_counts), record.prompt_tokens))
        return None

    for shape in PROBE_SHAPES:
        problem = await probe(shape)
        if problem is not None:
            return Calibration(ONE_TOKEN_PER_WORD, probes, f"{problem}; one word is taken as one token")
    first = _solve(rows, "probe")
    # Check at the workload's own length and refit with it: a real tokenizer is not exactly
    # linear, and the typical length is where the fit must be right.
    limit = CHECK_PROBE_LIMIT if context_window is None else min(CHECK_PROBE_LIMIT, context_window // 2)
    target = min(max(typical_tokens, 64.0), float(limit))
    check_words = first.words_for(target, 1, 0)
    if check_words > PROBE_SHAPES[1][0]:
        problem = await probe((check_words,))
        if problem is not None:
            return Calibration(first, probes, f"the check probe failed ({problem}); the first fit is used")
        predicted = first.tokens(check_words, 1)
        probes[-1]["predicted_tokens"] = round(predicted, 1)
        return Calibration(_solve(rows, "probe and check"), probes, "")
    return Calibration(first, probes, "")


def _solve(rows: Sequence[tuple[int, int, int]], source: str) -> TokenFit:
    """Least squares for (per_request, per_message, per_word) over the probe rows."""
    design = np.array([[1.0, messages, words] for messages, words, _ in rows])
    reported = np.array([float(tokens) for _, _, tokens in rows])
    (per_request, per_message, per_word), *_ = np.linalg.lstsq(design, reported, rcond=None)
    if not per_word > 0:  # a target whose counts do not grow with the text: keep words = tokens
        return TokenFit(source=f"{source}: no usable slope; one token per word")
    return TokenFit(
        per_word=float(per_word),
        per_message=float(per_message),
        per_request=float(per_request),
        source=f"{source}: fitted to the target's usage.prompt_tokens",
    )
