"""Malformed profiles, generated (hypothesis): each loads or gives one clear ProfileError,
never a traceback of another kind."""

from __future__ import annotations

import copy
import tomllib
from pathlib import Path
from typing import Any

from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from loadrun.errors import ProfileError
from loadrun.profile import Profile, load_profile, profile_from_dict

VALID: dict[str, Any] = {
    "name": "fuzzed",
    "seed": 4,
    "load": {"arrival": "poisson", "rate_per_s": 2.0, "duration_s": 5.0, "in_flight_cap": 8},
    "classes": [
        {
            "name": "a",
            "weight": 2,
            "system_prompt": "hi",
            "input_tokens": {"distribution": "lognormal", "median": 100, "sigma": 0.3, "max": 400},
            "output_tokens": {"distribution": "uniform", "min": 5, "max": 9},
            "sampling": {"temperature": 0.1},
            "shared_prefix": {"tokens": 20, "share": 0.5},
            "session": {"turns": 2, "think_time_s": {"distribution": "exponential", "mean": 1.0}},
            "check": {"kind": "choice", "labels": ["x", "y"]},
        },
        {
            "name": "b",
            "input_tokens": 50,
            "output_tokens": 8,
            "check": {"kind": "json_schema", "schema": {"type": "object"}, "via": "tools", "name": "f"},
        },
    ],
}

KEYS = [
    "name", "seed", "load", "classes", "request", "arrival", "rate_per_s", "duration_s", "requests",
    "in_flight_cap", "concurrency", "trace", "weight", "input_tokens", "output_tokens", "distribution",
    "median", "sigma", "min", "max", "mean", "sd", "values", "file", "sampling", "shared_prefix", "tokens",
    "share", "session", "turns", "think_time_s", "history", "check", "kind", "labels", "pattern", "schema",
    "via", "stream", "prompts_file", "burst_cv", "replay_speed", "warmup_s", "calibrate_input", "bogus",
]  # fmt: skip

scalars = st.one_of(
    st.none(),
    st.booleans(),
    st.integers(min_value=-(2**63), max_value=2**63 - 1),
    st.floats(allow_nan=True, allow_infinity=True),
    st.text(max_size=12),
    st.sampled_from(["poisson", "replay", "uniform", "lognormal", "empirical", "choice", "regex", "(["]),
)
values = st.recursive(
    scalars,
    lambda inner: st.one_of(
        st.lists(inner, max_size=4), st.dictionaries(st.sampled_from(KEYS), inner, max_size=4)
    ),
    max_leaves=12,
)


def paths(document: Any, prefix: tuple[Any, ...] = ()) -> list[tuple[Any, ...]]:
    found = [prefix]
    if isinstance(document, dict):
        for key, value in document.items():
            found += paths(value, (*prefix, key))
    elif isinstance(document, list):
        for index, value in enumerate(document):
            found += paths(value, (*prefix, index))
    return found


def mutate(document: dict[str, Any], path: tuple[Any, ...], value: Any, key: str | None) -> dict[str, Any]:
    """Replace the node at ``path`` with ``value``, or add ``key`` = value to it if it is a table."""
    result = copy.deepcopy(document)
    if not path:
        return result | {key or "bogus": value}
    parent: Any = result
    for part in path[:-1]:
        parent = parent[part]
    node = parent[path[-1]]
    if key is not None and isinstance(node, dict):
        node[key] = value
    else:
        parent[path[-1]] = value
    return result


def check_outcome(document: dict[str, Any]) -> None:
    try:
        profile = profile_from_dict(document, source="fuzz.toml")
    except ProfileError as exc:
        message = str(exc)
        assert message.startswith("fuzz.toml: "), message
        assert "\n" not in message, message
        return
    assert isinstance(profile, Profile)
    profile.describe()
    next(iter(profile.requests()))  # a profile that loads can also make requests


def test_the_base_document_is_valid() -> None:
    check_outcome(VALID)
    assert isinstance(profile_from_dict(VALID), Profile)


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(data=st.data())
def test_mutated_profiles_give_a_clear_error_or_load(data: st.DataObject) -> None:
    document = copy.deepcopy(VALID)
    for _ in range(data.draw(st.integers(1, 3))):
        path = data.draw(st.sampled_from(paths(document)))
        key = data.draw(st.one_of(st.none(), st.sampled_from(KEYS)))
        document = mutate(document, path, data.draw(values), key)
    check_outcome(document)


@settings(max_examples=150, deadline=None)
@given(document=st.dictionaries(st.sampled_from(KEYS), values, max_size=5))
def test_arbitrary_tables_give_a_clear_error_or_load(document: dict[str, Any]) -> None:
    check_outcome(document)


@settings(max_examples=100, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(text=st.text(max_size=200))
def test_arbitrary_files_give_a_clear_error_or_load(tmp_path: Path, text: str) -> None:
    path = tmp_path / "fuzz.toml"
    path.write_text(text, encoding="utf-8")
    try:
        load_profile(path)
    except ProfileError as exc:
        assert str(exc).startswith(f"{path}: ")
        assert "\n" not in str(exc) or "not valid TOML" in str(exc)


def test_toml_values_that_python_parses_oddly() -> None:
    """Values TOML allows that are easy to mishandle: inf, nan, huge integers, dates."""
    for text in (
        "[request]\ninput_tokens = inf\n",
        "[request]\ninput_tokens = 99999999999999999\n",
        "[load]\nwarmup_s = -inf\n",
        "seed = 1979-05-27\n",
        "[request]\nsystem_prompt = 1979-05-27T07:32:00Z\n",
    ):
        document = tomllib.loads(text)
        try:
            profile_from_dict(document, source="odd.toml")
        except ProfileError as exc:
            assert str(exc).startswith("odd.toml: ")
        else:
            raise AssertionError(f"accepted {text!r}")
