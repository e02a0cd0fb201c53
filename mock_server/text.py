"""Deterministic pseudo-text in an invented vocabulary, and the mock's own tokenizer.

The words are made-up syllable strings (no real language), built once from a fixed seed so
every process on every machine sees the same vocabulary. A request's output words depend only
on (engine seed, prompt text, max_tokens), so a repeated request repeats its answer.

The tokenizer is deliberately simple: ``count_tokens`` counts whitespace-separated words and
scales by ``tokens_per_word``, rounding up; any non-empty text is at least one token.
"""

from __future__ import annotations

import hashlib
import math
import random

_ONSETS = ("b", "d", "f", "g", "k", "l", "m", "n", "p", "r", "s", "t", "v", "z", "th", "sk")
_VOWELS = ("a", "e", "i", "o", "u", "ai", "ou")
_CODAS = ("", "", "", "n", "r", "l", "sh", "x")
_VOCABULARY_SIZE = 1024
_VOCABULARY_SEED = 20240611


def _build_vocabulary() -> tuple[str, ...]:
    # A private generator so the vocabulary never depends on the global random state.
    rng = random.Random(_VOCABULARY_SEED)
    seen: set[str] = set()
    words: list[str] = []
    while len(words) < _VOCABULARY_SIZE:
        syllables = rng.choice((1, 2, 2, 3))
        word = "".join(
            rng.choice(_ONSETS) + rng.choice(_VOWELS) + rng.choice(_CODAS) for _ in range(syllables)
        )
        if word not in seen:
            seen.add(word)
            words.append(word)
    return tuple(words)


VOCABULARY: tuple[str, ...] = _build_vocabulary()
"""The invented words; only ASCII letters, so they never need JSON escaping."""


def count_tokens(text: str, tokens_per_word: float = 1.0) -> int:
    """Return ceil(words * tokens_per_word) for ``text``; at least 1 if ``text`` is non-empty."""
    if not text:
        return 0
    words = len(text.split())
    return max(1, math.ceil(words * tokens_per_word))


def choose_word_indices(seed: int, prompt: str, max_tokens: int | None, count: int) -> list[int]:
    """Return ``count`` indices into VOCABULARY, fixed by (seed, prompt, max_tokens).

    blake2b (not ``hash``) keeps the choice stable across processes, whose string hashing
    is randomised.
    """
    key = f"{seed}\x00{max_tokens}\x00".encode() + prompt.encode("utf-8", "surrogatepass")
    digest = hashlib.blake2b(key, digest_size=8).digest()
    rng = random.Random(int.from_bytes(digest, "big"))
    return rng.choices(range(len(VOCABULARY)), k=count)


def generate_text(seed: int, prompt: str, max_tokens: int | None, count: int) -> str:
    """Return the ``count``-token answer for a request: each token is one word and a space."""
    return "".join(VOCABULARY[index] + " " for index in choose_word_indices(seed, prompt, max_tokens, count))
