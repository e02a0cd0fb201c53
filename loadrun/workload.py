"""Workload: a profile turned into conversations, ready to send.

Every arrival is one conversation of a request class drawn by weight: one request for a
plain class, ``turns`` requests for a session. Everything random about a conversation (its
class, lengths, words, think times, whether it reuses the shared prefix) is drawn when it is
made, from generators seeded by the profile's seed, so one seed always gives the same
sequence of conversations. Only what the target answers (carried forward as history) is
not decided in advance.

Lengths are in the target's tokens: the first request of a conversation asks for an input
length drawn from the class's distribution, turned into words through the TokenFit that
calibration learned (``loadrun.prompts``). Later turns add a new question of a drawn length
to the history; their requested length is what the fit predicts for the whole prompt.
"""

from __future__ import annotations

import random
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from typing import Any

from loadrun.answers import Answer
from loadrun.profile import MAX_TOKENS, Profile, RequestSpec
from loadrun.prompts import ONE_TOKEN_PER_WORD, TokenFit, count_words, synthesize
from loadrun.protocol import ChatRequest
from loadrun.record import Record


@dataclass(frozen=True, slots=True)
class TurnPlan:
    text: str
    """The new user message (synthesized turns), empty for a prompt-file conversation."""
    max_tokens: int
    requested_tokens: int | None
    """Requested input length of the whole prompt, when it was drawn rather than predicted."""
    think_before_s: float


@dataclass(slots=True)
class Conversation:
    """One arrival: its class, its planned turns, and the history so far."""

    number: int
    spec: RequestSpec
    base: tuple[dict[str, Any], ...]
    """Messages every turn starts with (system prompt; a prompt file's whole list)."""
    turns: tuple[TurnPlan, ...]
    fit: TokenFit = ONE_TOKEN_PER_WORD
    context_window: int | None = None
    history: list[dict[str, Any]] = field(default_factory=list)

    @classmethod
    def single(cls, request: ChatRequest, number: int = 0) -> Conversation:
        """A one-request conversation around a ready-made request (no class, no check)."""
        spec = RequestSpec(
            input_tokens=1, output_tokens=request.max_tokens, stream=request.stream, sampling=request.extra
        )
        turn = TurnPlan("", request.max_tokens, None, 0.0)
        return cls(number, spec, tuple(request.messages), (turn,))

    @property
    def needs_answer(self) -> bool:
        """True when the answer's text must be kept (an answer check, or history to carry)."""
        carries = self.spec.session is not None and self.spec.session.history and len(self.turns) > 1
        return self.spec.check is not None or carries

    def messages(self, turn: int) -> list[dict[str, Any]]:
        messages = list(self.base)
        if turn > 0 and self.spec.session is not None and self.spec.session.history:
            messages.extend(self.history)
        text = self.turns[turn].text
        if text:
            messages.append({"role": "user", "content": text})
        return messages

    def request(self, turn: int) -> ChatRequest:
        extra = self.spec.sampling
        if self.spec.check is not None:
            extra = extra + self.spec.check.request_fields()
        return ChatRequest(
            messages=tuple(self.messages(turn)),
            max_tokens=self.turns[turn].max_tokens,
            stream=self.spec.stream,
            extra=extra,
        )

    def requested_input_tokens(self, request: ChatRequest, turn: int) -> int:
        drawn = self.turns[turn].requested_tokens
        return drawn if drawn is not None else self.fit.predict(request.messages)

    def refusal(self, request: ChatRequest) -> str | None:
        """Why the request must not be sent (it would exceed the context window), or None."""
        if self.context_window is None:
            return None
        needed = self.fit.predict(request.messages) + request.max_tokens
        if needed <= self.context_window:
            return None
        return (
            f"refused before sending: about {needed} tokens ({needed - request.max_tokens} input "
            f"+ {request.max_tokens} max_tokens) exceed the target's context window of {self.context_window}"
        )

    def stamp(self, record: Record, request: ChatRequest, turn: int) -> None:
        """Label a record with this conversation's class and turn, and what was requested."""
        record.request_class = self.spec.name
        record.conversation = self.number
        record.turn = turn
        record.requested_input_tokens = self.requested_input_tokens(request, turn)
        record.requested_output_tokens = request.max_tokens

    def finish_turn(self, turn: int, record: Record, answer: Answer | None) -> bool:
        """Judge the answer, carry it forward; True if the conversation goes on."""
        if record.ok and answer is not None and answer.received and self.spec.check is not None:
            record.compliant, record.check_note = self.spec.check.judge(answer)
        if not record.ok:
            return False  # a user whose request failed does not ask the follow-up
        text = self.turns[turn].text
        if text:
            self.history.append({"role": "user", "content": text})
        reply = answer.text if answer is not None else ""
        self.history.append({"role": "assistant", "content": reply})
        return turn + 1 < len(self.turns)


class Workload:
    """Conversations of a profile, for one target (its TokenFit and context window)."""

    def __init__(
        self,
        profile: Profile,
        fit: TokenFit = ONE_TOKEN_PER_WORD,
        context_window: int | None = None,
        think_scale: float = 1.0,
    ) -> None:
        self.profile = profile
        self.think_scale = think_scale
        """Multiplies session think times (a trace replayed at 2x speed halves them too)."""
        self.fit = fit
        self.context_window = context_window
        self.mix = profile.mix()
        self._weights = [spec.weight for spec in self.mix]
        self._by_name = {spec.name: spec for spec in self.mix}
        self._rng = random.Random(f"{profile.seed}:requests")
        self._prompt_cursor: dict[str, int] = {}
        self._count = 0
        self._prefixes = {
            spec.name: self._prefix_text(spec, random.Random(f"{profile.seed}:prefix:{spec.name}"))
            for spec in self.mix
            if spec.shared_prefix is not None
        }

    def class_named(self, name: str) -> RequestSpec | None:
        return self._by_name.get(name)

    def conversations(self) -> Iterator[Conversation]:
        """An endless, seed-determined sequence of conversations."""
        while True:
            yield self.next_conversation()

    def next_conversation(
        self,
        spec: RequestSpec | None = None,
        input_tokens: int | None = None,
        output_tokens: int | None = None,
    ) -> Conversation:
        """The next conversation: of ``spec`` (else drawn by weight), with lengths if given."""
        rng = self._rng  # structure: class, lengths, think times, prefix reuse
        if spec is None:
            spec = self.mix[0] if len(self.mix) == 1 else rng.choices(self.mix, weights=self._weights)[0]
        self._count += 1
        base: list[dict[str, Any]] = []
        if spec.prompts is not None:
            cursor = self._prompt_cursor.get(spec.name, 0)
            self._prompt_cursor[spec.name] = cursor + 1
            base = spec.prompts.messages(cursor)
            if spec.system_prompt and base[0]["role"] != "system":
                base.insert(0, {"role": "system", "content": spec.system_prompt})
            max_tokens = output_tokens or self._draw_tokens(spec.output_distribution().draw_int, rng)
            turns: tuple[TurnPlan, ...] = (TurnPlan("", max_tokens, None, 0.0),)
            return Conversation(self._count, spec, tuple(base), turns, self.fit, self.context_window)
        if spec.system_prompt:
            base.append({"role": "system", "content": spec.system_prompt})
        # Words come from their own generator, so that a different TokenFit (another target)
        # changes only how many words there are, never the classes or lengths drawn.
        words_rng = random.Random(f"{self.profile.seed}:words:{self._count}")
        plans = []
        for turn in range(spec.turns):
            drawn = input_tokens if input_tokens is not None and turn == 0 else None
            target = drawn or self._draw_tokens(spec.input_distribution().draw_int, rng)
            max_tokens = (output_tokens if turn == 0 else None) or self._draw_tokens(
                spec.output_distribution().draw_int, rng
            )
            think = 0.0
            if spec.session is not None and turn > 0:
                think = spec.session.think_time.draw(rng) * self.think_scale
            if turn == 0:
                reuse = spec.shared_prefix is not None and rng.random() < spec.shared_prefix.share
                text = self._first_text(spec, base, target, reuse, words_rng)
                plans.append(TurnPlan(text, max_tokens, target, max(0.0, think)))
            else:
                words = max(1, round(target / self.fit.per_word))
                plans.append(TurnPlan(synthesize(words, words_rng), max_tokens, None, max(0.0, think)))
        return Conversation(self._count, spec, tuple(base), tuple(plans), self.fit, self.context_window)

    def _first_text(
        self, spec: RequestSpec, base: list[dict[str, Any]], target: int, reuse: bool, rng: random.Random
    ) -> str:
        """The first user message: [shared or fresh prefix] + new words, to ``target`` tokens."""
        prefix = ""
        if spec.shared_prefix is not None:
            prefix = self._prefixes[spec.name] if reuse else self._prefix_text(spec, rng)
        if prefix:
            # A request shorter than the prefix keeps the prefix's beginning (still shared).
            room = self.fit.words_for(target, len(base) + 1, count_words(base))
            prefix_words = prefix.split()
            if len(prefix_words) >= room:
                prefix = " ".join(prefix_words[: max(0, room - 1)])
        other_words = count_words(base) + len(prefix.split())
        words = self.fit.words_for(target, len(base) + 1, other_words)
        text = synthesize(words, rng)
        return f"{prefix} {text}" if prefix else text

    def _prefix_text(self, spec: RequestSpec, rng: random.Random) -> str:
        assert spec.shared_prefix is not None
        return synthesize(max(1, round(spec.shared_prefix.tokens / self.fit.per_word)), rng)

    @staticmethod
    def _draw_tokens(draw: Callable[[random.Random], int], rng: random.Random) -> int:
        return min(MAX_TOKENS, draw(rng))
