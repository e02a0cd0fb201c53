"""Answer checks (choice, regex, JSON Schema via the jsonschema library) and the answer tap,
end to end through the real client with streamed and whole answers from a mock transport."""

from __future__ import annotations

import json
from collections.abc import AsyncIterator
from typing import Any

import httpx
import pytest

from loadrun.answers import Answer, AnswerTap, ToolCall, collecting_answer
from loadrun.checks import ChoiceCheck, JsonSchemaCheck, RegexCheck
from loadrun.client import ChatClient
from loadrun.driver import send_turn
from loadrun.profile import LoadSpec, Profile, RequestSpec, profile_from_dict
from loadrun.record import Record
from loadrun.target import Target
from loadrun.transports.general import HttpxTransport
from loadrun.workload import Workload

SCHEMA = {
    "type": "object",
    "properties": {"vessel": {"type": "string"}, "nights": {"type": "integer", "minimum": 1}},
    "required": ["vessel", "nights"],
    "additionalProperties": False,
}


@pytest.fixture
def anyio_backend() -> str:
    return "asyncio"


def answer(text: str = "", calls: list[tuple[str, str]] | None = None) -> Answer:
    return Answer(
        parts=[text], tool_calls=[ToolCall(name, args) for name, args in calls or []], received=True
    )


@pytest.mark.parametrize(
    ("text", "ok"),
    [
        ("urgent", True),
        (" Routine.\n", True),
        ("URGENT", True),
        ("urgent!", False),
        ("urgent routine", False),
        ("", False),
    ],
)
def test_choice_check_wants_exactly_one_label(text: str, ok: bool) -> None:
    complied, note = ChoiceCheck(("urgent", "routine")).judge(answer(text))
    assert complied is ok
    assert (note is None) is ok


def test_choice_check_can_be_case_sensitive() -> None:
    assert ChoiceCheck(("Yes", "No"), ignore_case=False).judge(answer("yes"))[0] is False


def test_regex_check_searches_or_matches_whole() -> None:
    assert RegexCheck(r"```python\n").judge(answer("Here:\n```python\nx = 1\n```"))[0]
    assert not RegexCheck(r"\d+", whole=True).judge(answer("42 knots"))[0]
    assert RegexCheck(r"\d+", whole=True).judge(answer(" 42 "))[0]


def test_json_schema_check_via_response_format() -> None:
    check = JsonSchemaCheck(json.dumps(SCHEMA), "response_format", "berth")
    assert check.judge(answer('{"vessel": "Marram Star", "nights": 2}')) == (True, None)
    complied, note = check.judge(answer('{"vessel": "Marram Star", "nights": 0}'))
    assert not complied and note is not None and "nights" in note
    assert check.judge(answer("Sure! Here is the JSON"))[1] == "not JSON: 'Sure! Here is the JSON'"
    fields = dict(check.request_fields())
    assert fields["response_format"]["json_schema"]["schema"] == SCHEMA
    assert fields["response_format"]["type"] == "json_schema"


def test_json_schema_check_via_tools() -> None:
    check = JsonSchemaCheck(json.dumps(SCHEMA), "tools", "record_berth")
    good = answer(calls=[("record_berth", '{"vessel": "Tern", "nights": 3}')])
    assert check.judge(good) == (True, None)
    assert (
        check.judge(answer('{"vessel": "Tern", "nights": 3}'))[1] == "no call of the function 'record_berth'"
    )
    fields = dict(check.request_fields())
    assert fields["tools"][0]["function"] == {"name": "record_berth", "parameters": SCHEMA}
    assert fields["tool_choice"] == {"type": "function", "function": {"name": "record_berth"}}


# --- the tap, through the real client ----------------------------------------------------------


def sse(chunks: list[dict[str, Any]]) -> bytes:
    return (
        b"".join(b"data: " + json.dumps(chunk).encode() + b"\n\n" for chunk in chunks) + b"data: [DONE]\n\n"
    )


def streamed_text(pieces: list[str]) -> bytes:
    chunks: list[dict[str, Any]] = [
        {"choices": [{"index": 0, "delta": {"role": "assistant", "content": ""}}]}
    ]
    chunks += [{"choices": [{"index": 0, "delta": {"content": piece}}]} for piece in pieces]
    chunks.append({"choices": [{"index": 0, "delta": {}, "finish_reason": "stop"}]})
    chunks.append({"choices": [], "usage": {"prompt_tokens": 7, "completion_tokens": len(pieces)}})
    return sse(chunks)


def streamed_tool_call(name: str, arguments: list[str]) -> bytes:
    first = {"index": 0, "id": "call_1", "type": "function", "function": {"name": name, "arguments": ""}}
    chunks: list[dict[str, Any]] = [{"choices": [{"index": 0, "delta": {"tool_calls": [first]}}]}]
    for piece in arguments:
        delta = {"tool_calls": [{"index": 0, "function": {"arguments": piece}}]}
        chunks.append({"choices": [{"index": 0, "delta": delta}]})
    chunks.append({"choices": [{"index": 0, "delta": {}, "finish_reason": "tool_calls"}]})
    return sse(chunks)


def client_for(body: bytes, content_type: str, seen: list[dict[str, Any]]) -> ChatClient:
    async def stream() -> AsyncIterator[bytes]:
        for start in range(0, len(body), 7):  # small pieces: events split across reads
            yield body[start : start + 7]

    def handler(request: httpx.Request) -> httpx.Response:
        seen.append(json.loads(request.content))
        return httpx.Response(200, headers={"content-type": content_type}, content=stream())

    transport = HttpxTransport(httpx.AsyncClient(transport=httpx.MockTransport(handler)))
    return ChatClient(Target(base_url="http://127.0.0.1:9/v1", model="m"), AnswerTap(transport))


def one_conversation(raw: dict[str, Any]) -> Any:
    return next(Workload(profile_from_dict(raw)).conversations())


@pytest.mark.anyio
async def test_streamed_choice_answer_is_judged_and_recorded() -> None:
    seen: list[dict[str, Any]] = []
    client = client_for(streamed_text(["Urg", "ent"]), "text/event-stream", seen)
    conversation = one_conversation(
        {"request": {"output_tokens": 1, "check": {"kind": "choice", "labels": ["urgent", "routine"]}}}
    )
    record = Record(request_id=1, intended_ns=0)
    await send_turn(conversation, 0, record, client.execute)
    assert record.ok and record.compliant is True and record.check_note is None
    assert record.output_tokens == 2 and record.first_token_ns > 0
    assert record.to_json(0)["compliant"] is True and record.to_json(0)["class"] == "default"


@pytest.mark.anyio
async def test_streamed_tool_call_is_checked_against_the_schema() -> None:
    seen: list[dict[str, Any]] = []
    client = client_for(
        streamed_tool_call("record_berth", ['{"vessel": ', '"Tern", "nights": 0}']), "text/event-stream", seen
    )
    check = {"kind": "json_schema", "via": "tools", "name": "record_berth", "schema": SCHEMA}
    conversation = one_conversation({"request": {"check": check}})
    record = Record(request_id=1, intended_ns=0)
    await send_turn(conversation, 0, record, client.execute)
    assert record.ok and record.compliant is False
    assert record.check_note is not None and "nights" in record.check_note
    assert seen[0]["tools"][0]["function"]["name"] == "record_berth"
    assert seen[0]["tool_choice"]["function"]["name"] == "record_berth"


@pytest.mark.anyio
async def test_whole_json_answer_via_response_format_complies() -> None:
    body = json.dumps(
        {
            "choices": [
                {"index": 0, "message": {"role": "assistant", "content": '{"vessel": "Tern", "nights": 2}'}}
            ],
            "usage": {"prompt_tokens": 9, "completion_tokens": 12},
        }
    ).encode()
    seen: list[dict[str, Any]] = []
    client = client_for(body, "application/json", seen)
    check = {"kind": "json_schema", "schema": SCHEMA}
    conversation = one_conversation({"request": {"stream": False, "check": check}})
    record = Record(request_id=1, intended_ns=0)
    await send_turn(conversation, 0, record, client.execute)
    assert record.ok and record.compliant is True and record.output_tokens == 12
    assert seen[0]["response_format"]["json_schema"]["schema"] == SCHEMA


@pytest.mark.anyio
async def test_requests_without_a_check_keep_no_text() -> None:
    seen: list[dict[str, Any]] = []
    client = client_for(streamed_text(["a", "b"]), "text/event-stream", seen)
    conversation = next(Workload(Profile(request=RequestSpec(), load=LoadSpec())).conversations())
    assert not conversation.needs_answer
    record = Record(request_id=1, intended_ns=0)
    await send_turn(conversation, 0, record, client.execute)
    assert record.ok and record.compliant is None
    with collecting_answer() as kept:
        await client.execute(conversation.request(0), Record(request_id=2, intended_ns=0))
    assert kept.text == "ab" and kept.received


@pytest.mark.anyio
async def test_history_carries_the_real_answer() -> None:
    seen: list[dict[str, Any]] = []
    client = client_for(streamed_text(["Take ", "the 9:15."]), "text/event-stream", seen)
    conversation = one_conversation({"request": {"input_tokens": 5, "session": {"turns": 2}}})
    for turn in (0, 1):
        record = Record(request_id=turn + 1, intended_ns=0)
        goes_on = await send_turn(conversation, turn, record, client.execute)
        assert record.ok
    assert not goes_on
    assert [message["role"] for message in seen[1]["messages"]] == ["user", "assistant", "user"]
    assert seen[1]["messages"][1]["content"] == "Take the 9:15."
