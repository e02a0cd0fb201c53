"""Prompt synthesis: text of a requested length from an invented vocabulary.

No tokenizer is bundled (every model tokenizes differently); here one word is one token,
which holds for the bundled mock's default tokenizer. Calibration against a target's
reported usage belongs to the workload-profile work.
"""

from __future__ import annotations

import random

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
