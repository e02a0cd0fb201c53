"""Answer checks: did the answer do what the request class asked for?

Three kinds, one per class at most:

- ``choice``: a classifier must answer exactly one of the given labels (surrounding
  whitespace and one trailing full stop are ignored; case too unless ``ignore_case`` is off);
- ``regex``: the answer must match a regular expression (``search``, or ``fullmatch``
  when ``whole = true``);
- ``json_schema``: the answer must be JSON valid against a JSON Schema (checked with the
  jsonschema library). The schema is requested as structured output either through
  ``response_format`` (the answer text is the JSON) or through ``tools`` (the answer is a
  call of one function whose arguments are the JSON).

A check judges one captured answer (``answers.Answer``) and returns (complied, why not).
"""

from __future__ import annotations

import json
import re
from dataclasses import dataclass, field
from typing import Any, Literal

import jsonschema
import jsonschema.exceptions

from loadrun.answers import Answer

Via = Literal["response_format", "tools"]


@dataclass(frozen=True, slots=True)
class ChoiceCheck:
    labels: tuple[str, ...]
    ignore_case: bool = True
    kind: str = field(default="choice", init=False)

    def judge(self, answer: Answer) -> tuple[bool, str | None]:
        text = answer.text.strip()
        if text.endswith("."):
            text = text[:-1].rstrip()
        wanted = text.casefold() if self.ignore_case else text
        for label in self.labels:
            if wanted == (label.casefold() if self.ignore_case else label):
                return True, None
        return False, f"not one of the labels: {_shorten(text)!r}"

    def request_fields(self) -> tuple[tuple[str, Any], ...]:
        return ()

    def describe(self) -> dict[str, Any]:
        return {"kind": self.kind, "labels": list(self.labels), "ignore_case": self.ignore_case}


@dataclass(frozen=True, slots=True)
class RegexCheck:
    pattern: str
    whole: bool = False
    kind: str = field(default="regex", init=False)

    def judge(self, answer: Answer) -> tuple[bool, str | None]:
        compiled = re.compile(self.pattern, re.DOTALL)
        found = compiled.fullmatch(answer.text.strip()) if self.whole else compiled.search(answer.text)
        return (True, None) if found else (False, f"no match for /{_shorten(self.pattern)}/")

    def request_fields(self) -> tuple[tuple[str, Any], ...]:
        return ()

    def describe(self) -> dict[str, Any]:
        return {"kind": self.kind, "pattern": self.pattern, "whole": self.whole}


@dataclass(frozen=True, slots=True)
class JsonSchemaCheck:
    schema_json: str
    """The schema, as canonical JSON text (hashable, so the check stays a frozen value)."""
    via: Via = "response_format"
    name: str = "answer"
    """The name of the schema (response_format) or of the function (tools)."""
    kind: str = field(default="json_schema", init=False)

    @property
    def schema(self) -> dict[str, Any]:
        value: dict[str, Any] = json.loads(self.schema_json)
        return value

    def judge(self, answer: Answer) -> tuple[bool, str | None]:
        if self.via == "tools":
            calls = [call for call in answer.tool_calls if call.name == self.name]
            if not calls:
                return False, f"no call of the function {self.name!r}"
            text = calls[0].arguments
        else:
            text = answer.text
        try:
            document = json.loads(text)
        except ValueError:
            return False, f"not JSON: {_shorten(text.strip())!r}"
        validator = jsonschema.validators.validator_for(self.schema)(self.schema)
        error = jsonschema.exceptions.best_match(validator.iter_errors(document))
        if error is not None:
            where = "/".join(str(part) for part in error.absolute_path) or "(top)"
            return False, f"schema: {where}: {_shorten(error.message)}"
        return True, None

    def request_fields(self) -> tuple[tuple[str, Any], ...]:
        """What the request must carry to ask for structured output."""
        if self.via == "tools":
            function = {"name": self.name, "parameters": self.schema}
            return (
                ("tools", [{"type": "function", "function": function}]),
                ("tool_choice", {"type": "function", "function": {"name": self.name}}),
            )
        return (
            (
                "response_format",
                {
                    "type": "json_schema",
                    "json_schema": {"name": self.name, "schema": self.schema, "strict": True},
                },
            ),
        )

    def describe(self) -> dict[str, Any]:
        return {"kind": self.kind, "via": self.via, "name": self.name, "schema": self.schema}


AnswerCheck = ChoiceCheck | RegexCheck | JsonSchemaCheck


def schema_problem(schema: Any) -> str | None:
    """Why ``schema`` is not a usable JSON Schema, or None when it is."""
    if not isinstance(schema, dict):
        return "must be a table (a JSON Schema object)"
    try:
        jsonschema.validators.validator_for(schema).check_schema(schema)
    except jsonschema.exceptions.SchemaError as exc:
        return f"not a valid JSON Schema: {_shorten(exc.message)}"
    return None


def _shorten(text: str, limit: int = 80) -> str:
    return text if len(text) <= limit else text[: limit - 3] + "..."
