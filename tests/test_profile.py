"""Profiles: the two forms, validation with file and key path, and the workload they make."""

from __future__ import annotations

import itertools
import math
import random
from collections import Counter
from pathlib import Path

import pytest
from scipy import stats

from loadrun.distributions import Distribution
from loadrun.errors import ProfileError
from loadrun.profile import LoadSpec, Profile, RequestSpec, load_profile, profile_from_dict
from loadrun.prompts import TokenFit, count_words
from loadrun.workload import Workload

SIMPLE = """
name = "simple"
seed = 3
[request]
system_prompt = "Be brief."
input_tokens = 64
output_tokens = 16
stream = false
[request.sampling]
temperature = 0.3
[load]
concurrency = 4
requests = 20
warmup_s = 0.5
"""


def write(tmp_path: Path, text: str, name: str = "p.toml") -> Path:
    path = tmp_path / name
    path.write_text(text)
    return path


def test_simple_form_loads_as_one_class(tmp_path: Path) -> None:
    profile = load_profile(write(tmp_path, SIMPLE))
    assert profile.mix() == (profile.request,)
    spec = profile.request
    assert (spec.input_tokens, spec.output_tokens, spec.stream, spec.system_prompt) == (
        64,
        16,
        False,
        "Be brief.",
    )
    assert dict(spec.sampling) == {"temperature": 0.3}
    assert profile.load == LoadSpec(concurrency=4, duration_s=None, requests=20, warmup_s=0.5)
    request = next(profile.requests())
    assert request.max_tokens == 16 and not request.stream
    assert request.messages[0] == {"role": "system", "content": "Be brief."}
    # One word per token unless calibrated: the whole prompt comes to the asked length.
    assert count_words(request.messages) == 64


def test_programmatic_profiles_still_work() -> None:
    profile = Profile(request=RequestSpec(input_tokens=32, output_tokens=8), load=LoadSpec())
    first = list(itertools.islice(profile.requests(), 5))
    assert first == list(itertools.islice(profile.requests(), 5))
    assert all(count_words(request.messages) == 32 and request.max_tokens == 8 for request in first)


MIX = """
name = "mix"
seed = 9
[load]
arrival = "poisson"
rate_per_s = 4.0
[[classes]]
name = "a"
weight = 3
input_tokens = { distribution = "uniform", min = 100, max = 300 }
output_tokens = { distribution = "lognormal", median = 50, sigma = 0.3 }
[[classes]]
name = "b"
weight = 1
input_tokens = 40
output_tokens = 5
[classes.session]
turns = 2
think_time_s = 1.5
"""


def test_mix_draws_classes_by_weight_and_is_deterministic(tmp_path: Path) -> None:
    profile = load_profile(write(tmp_path, MIX))
    assert [spec.name for spec in profile.mix()] == ["a", "b"]
    assert profile.request.name == "mix" and profile.request.input_tokens == round((3 * 200 + 40) / 4)
    names = [c.spec.name for c in itertools.islice(Workload(profile).conversations(), 4000)]
    counts = Counter(names)
    # Chi-square goodness of fit against the weights 3:1 (scipy.stats.chisquare).
    assert stats.chisquare([counts["a"], counts["b"]], [3000, 1000]).pvalue > 0.01
    again = [c.spec.name for c in itertools.islice(Workload(profile).conversations(), 4000)]
    assert names == again
    other = load_profile(write(tmp_path, MIX.replace("seed = 9", "seed = 10"), "q.toml"))
    assert names != [c.spec.name for c in itertools.islice(Workload(other).conversations(), 4000)]


def test_same_seed_same_requests_whatever_the_fit(tmp_path: Path) -> None:
    """Classes and lengths depend on the seed only; another target's fit changes word counts."""
    profile = load_profile(write(tmp_path, MIX))
    plain = list(itertools.islice(Workload(profile).conversations(), 200))
    fitted = list(itertools.islice(Workload(profile, TokenFit(per_word=1.4)).conversations(), 200))
    assert [(c.spec.name, [t.max_tokens for t in c.turns]) for c in plain] == [
        (c.spec.name, [t.max_tokens for t in c.turns]) for c in fitted
    ]
    assert [c.turns[0].requested_tokens for c in plain] == [c.turns[0].requested_tokens for c in fitted]
    first = plain[0].request(0)
    assert first == next(iter(Workload(profile).conversations())).request(0)


@pytest.mark.parametrize(
    ("table", "mean", "law"),
    [
        ({"distribution": "uniform", "min": 100, "max": 300}, 200, stats.uniform(100, 200)),
        ({"distribution": "normal", "mean": 500, "sd": 50}, 500, stats.norm(500, 50)),
        (
            {"distribution": "lognormal", "median": 400, "sigma": 0.5},
            400 * math.exp(0.125),
            stats.lognorm(0.5, 0, 400),
        ),
        ({"distribution": "exponential", "mean": 2.5}, 2.5, stats.expon(0, 2.5)),
    ],
)
def test_length_distributions_draw_what_they_say(table: dict[str, object], mean: float, law: object) -> None:
    """Kolmogorov-Smirnov against the scipy.stats law of the same parameters."""
    reader_profile = profile_from_dict({"request": {"input_tokens": table}})
    distribution = reader_profile.request.input_length
    assert distribution is not None
    assert distribution.mean() == pytest.approx(mean)
    rng = random.Random(2)
    sample = [distribution.draw(rng) for _ in range(4000)]
    if table["distribution"] != "exponential":  # lengths are at least 1; exponential is for think times
        assert stats.kstest(sample, law.cdf).pvalue > 0.01  # type: ignore[attr-defined]


def test_empirical_lengths_from_a_file_and_clamping(tmp_path: Path) -> None:
    (tmp_path / "lengths.txt").write_text("# lengths\n100\n200\n\n400 # long\n")
    text = '[request]\ninput_tokens = { distribution = "empirical", file = "lengths.txt", max = 300 }\n'
    profile = load_profile(write(tmp_path, text))
    distribution = profile.request.input_length
    assert distribution is not None and distribution.values == (100.0, 200.0, 400.0)
    rng = random.Random(1)
    drawn = {distribution.draw_int(rng) for _ in range(200)}
    assert drawn == {100, 200, 300}


def test_shared_prefix_is_shared_by_its_share(tmp_path: Path) -> None:
    text = """
[request]
input_tokens = 500
[request.shared_prefix]
tokens = 200
share = 0.7
"""
    profile = load_profile(write(tmp_path, text))
    firsts = [c.turns[0].text for c in itertools.islice(Workload(profile).conversations(), 2000)]
    prefixes = Counter(" ".join(text.split()[:200]) for text in firsts)
    _, shared_count = prefixes.most_common(1)[0]
    assert shared_count / len(firsts) == pytest.approx(0.7, abs=0.04)
    assert all(len(text.split()) == 500 for text in firsts)  # the prefix is part of the input length
    assert len(prefixes) == len(firsts) - shared_count + 1  # the others are all different


def test_session_carries_history_and_think_times(tmp_path: Path) -> None:
    profile = load_profile(write(tmp_path, MIX))
    conversation = next(c for c in Workload(profile).conversations() if c.spec.name == "b")
    assert len(conversation.turns) == 2 and conversation.turns[1].think_before_s == 1.5
    from loadrun.answers import Answer
    from loadrun.record import Record

    assert conversation.needs_answer
    record = Record(request_id=1, intended_ns=0)
    conversation.stamp(record, conversation.request(0), 0)
    assert conversation.finish_turn(0, record, Answer(parts=["the answer"], received=True))
    second = conversation.request(1)
    roles = [message["role"] for message in second.messages]
    assert roles == ["user", "assistant", "user"]
    assert second.messages[1]["content"] == "the answer"


def test_prompts_file_gives_the_messages(tmp_path: Path) -> None:
    (tmp_path / "p.jsonl").write_text(
        '[{"role": "user", "content": "first one"}]\n\n'
        '[{"role": "system", "content": "sys"}, {"role": "user", "content": "second"}]\n'
    )
    text = '[request]\nsystem_prompt = "Be kind."\nprompts_file = "p.jsonl"\noutput_tokens = 3\n'
    profile = load_profile(write(tmp_path, text))
    requests = list(itertools.islice(profile.requests(), 3))
    assert requests[0].messages == (
        {"role": "system", "content": "Be kind."},
        {"role": "user", "content": "first one"},
    )
    assert requests[1].messages == (
        {"role": "system", "content": "sys"},
        {"role": "user", "content": "second"},
    )
    assert requests[2].messages == requests[0].messages
    assert all(request.max_tokens == 3 for request in requests)


def test_context_window_refuses_what_would_not_fit() -> None:
    profile = Profile(request=RequestSpec(input_tokens=90, output_tokens=20), load=LoadSpec())
    conversation = next(Workload(profile, context_window=100).conversations())
    message = conversation.refusal(conversation.request(0))
    assert message is not None and "context window of 100" in message and "110" in message
    assert (
        next(Workload(profile, context_window=110).conversations()).refusal(conversation.request(0)) is None
    )


def test_with_lengths_fixes_every_class(tmp_path: Path) -> None:
    profile = load_profile(write(tmp_path, MIX)).with_lengths(77, 9)
    for spec in profile.mix():
        assert spec.input_distribution() == Distribution.fixed(77)
        assert spec.output_distribution() == Distribution.fixed(9)


BAD = [
    ("[request]\noutput_tokns = 5\n", "request.output_tokns", "unknown key"),
    ("colour = 1\n", "colour", "unknown key"),
    ("[request]\ninput_tokens = 0\n", "request.input_tokens", "at least 1"),
    ("[request]\ninput_tokens = 1.5\n", "request.input_tokens", "whole number"),
    ("[request]\ninput_tokens = nan\n", "request.input_tokens", "finite"),
    ('[request]\ninput_tokens = { distribution = "zipf" }\n', "request.input_tokens.distribution", "one of"),
    (
        '[request]\ninput_tokens = { distribution = "uniform", min = 5 }\n',
        "request.input_tokens.max",
        "required",
    ),
    (
        '[request]\ninput_tokens = { distribution = "uniform", min = 9, max = 5 }\n',
        "request.input_tokens.max",
        "min",
    ),
    (
        '[request]\ninput_tokens = { distribution = "normal", mean = 9 }\n',
        "request.input_tokens.sd",
        "required",
    ),
    ("[request]\ninput_tokens = { median = 9 }\n", "request.input_tokens.distribution", "missing"),
    (
        '[request]\ninput_tokens = { distribution = "empirical", values = [] }\n',
        "request.input_tokens.values",
        "non-empty",
    ),
    (
        '[request]\ninput_tokens = { distribution = "empirical", file = "none.txt" }\n',
        "request.input_tokens.file",
        "no such file",
    ),
    ("[request]\nstream = 1\n", "request.stream", "true or false"),
    ("[request]\nsampling = 3\n", "request.sampling", "must be a table"),
    ("[request.sampling]\nmax_tokens = 3\n", "request.sampling.max_tokens", "set by loadrun"),
    ("[request.shared_prefix]\nshare = 0.5\n", "request.shared_prefix.tokens", "required"),
    ("[request.shared_prefix]\ntokens = 10\nshare = 1.5\n", "request.shared_prefix.share", "at most 1"),
    ("[request.session]\nturns = 0\n", "request.session.turns", "at least 1"),
    ('[request.check]\nkind = "vibes"\n', "request.check.kind", "one of"),
    ('[request.check]\nkind = "choice"\nlabels = []\n', "request.check.labels", "non-empty"),
    ('[request.check]\nkind = "choice"\nlabels = ["a", "A"]\n', "request.check.labels", "differ"),
    ('[request.check]\nkind = "regex"\npattern = "(["\n', "request.check.pattern", "regular expression"),
    ('[request.check]\nkind = "json_schema"\nschema = { type = 3 }\n', "request.check.schema", "JSON Schema"),
    ('[request.check]\nkind = "json_schema"\n', "request.check.schema", "either"),
    ('[[classes]]\nname = "x"\n[[classes]]\nname = "x"\n', "classes[1].name", "earlier class"),
    ("[[classes]]\nweight = 0\n", "classes[0].weight", "more than 0"),
    ("classes = []\n", "classes", "non-empty"),
    ("[request]\n[[classes]]\n", "classes", "not both"),
    ('[load]\narrival = "poisson"\n', "load.rate_per_s", "required"),
    ('[load]\narrival = "sometimes"\n', "load.arrival", "one of"),
    ('[load]\narrival = "replay"\n', "load.trace", "required"),
    ("[load]\nrequests = 5\nduration_s = 3.0\n", "load.requests", "not both"),
    ("[load]\nconcurrency = 10000000\n", "load.concurrency", "at most"),
    ('[request]\nprompts_file = "p.jsonl"\ninput_tokens = 5\n', "request.input_tokens", "prompts file"),
]


@pytest.mark.parametrize(("text", "key", "problem"), BAD)
def test_bad_profiles_name_file_and_key(tmp_path: Path, text: str, key: str, problem: str) -> None:
    (tmp_path / "p.jsonl").write_text('[{"role": "user", "content": "x"}]\n')
    path = write(tmp_path, text, "bad.toml")
    with pytest.raises(ProfileError) as info:
        load_profile(path)
    message = str(info.value)
    assert message.startswith(f"{path}: {key}: "), message
    assert problem in message, message
    assert "\n" not in message


@pytest.mark.parametrize(
    ("line", "problem"),
    [
        ("not json", "not JSON"),
        ("[]", "non-empty JSON list"),
        ('[{"role": "user"}]', "message 0"),
        ('[{"role": "user", "content": 3}]', "message 0"),
    ],
)
def test_bad_prompt_files_name_the_line(tmp_path: Path, line: str, problem: str) -> None:
    (tmp_path / "p.jsonl").write_text('[{"role": "user", "content": "fine"}]\n' + line + "\n")
    path = write(tmp_path, '[request]\nprompts_file = "p.jsonl"\n')
    with pytest.raises(ProfileError, match=problem) as info:
        load_profile(path)
    assert "p.jsonl:2" in str(info.value)


def test_describe_records_the_classes(tmp_path: Path) -> None:
    described = load_profile(write(tmp_path, MIX)).describe()
    assert [entry["name"] for entry in described["classes"]] == ["a", "b"]
    assert described["classes"][0]["input_length"]["distribution"] == "uniform"
    assert described["load"]["arrival"] == "poisson" and described["load"]["rate_per_s"] == 4.0


def test_the_readme_example_is_a_valid_profile() -> None:
    """The README's complete example loads (its files resolve against profiles/)."""
    import textwrap
    import tomllib

    root = Path(__file__).resolve().parent.parent
    readme = (root / "README.md").read_text()
    start = readme.index("A complete profile, with every key")
    block = readme[readme.index("\n\n", start) + 2 : readme.index("\nLengths are a number", start)]
    profile = profile_from_dict(tomllib.loads(textwrap.dedent(block)), "README", base_dir=root / "profiles")
    assert [spec.name for spec in profile.mix()] == ["question", "triage", "berth-json"]
    assert profile.load.arrival == "poisson" and profile.load.trace is not None
    assert next(iter(profile.requests())).messages
