"""alignrun.config: every bad config gets a UserError naming the file (or --set), the key and what is expected;
paths resolve against the file that set them; show/check on the command line; TOML round trip."""

from __future__ import annotations

import math
import tempfile
from pathlib import Path

import pytest
import tomli_w
from hypothesis import given, settings
from hypothesis import strategies as st

from alignrun.cli import main
from alignrun.config import (
    DataSection,
    Experiment,
    apply_override,
    cache_dir,
    load_config,
    parse_override,
    to_toml,
    with_overrides,
)
from alignrun.errors import UserError

GOOD = """
[base]
model = "acme/tiny-seq2seq"

[reward]
source = "acme/harm-classifier"
harmful_labels = ["hostile"]

[data]
prompts = "prompts.jsonl"
"""


def write(folder: Path, name: str, text: str) -> Path:
    path = folder / name
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(text, encoding="utf-8")
    return path


def with_line(section: str, line: str) -> str:
    """GOOD with one more line in [section] (the section is added when GOOD has none)."""
    header = f"[{section}]\n"
    return GOOD.replace(header, header + line + "\n") if header in GOOD else GOOD + f"\n{header}{line}\n"


def config_error(path: Path, overrides: list[str] | None = None) -> str:
    with pytest.raises(UserError) as info:
        load_config(path, overrides or [])
    return str(info.value)


def test_good_config_loads_with_defaults(tmp_path):
    cfg = load_config(write(tmp_path, "exp.toml", GOOD))
    assert cfg.base.model == "acme/tiny-seq2seq"
    assert cfg.reward.harmful_labels == ["hostile"]
    assert cfg.ppo.minibatch == 8 and cfg.kl.coef == 0.1
    assert cfg.run.name == "exp"  # the file name without .toml


# ---------------------------------------------------------------- bad configs: one test per kind of mistake


@pytest.mark.parametrize(
    "section, line, key, found, expected",
    [
        ("ppo", 'steps = "ten"', "ppo.steps", "'ten'", "valid integer"),
        ("ppo", "steps = true", "ppo.steps", "True", "valid integer"),  # TOML booleans are not numbers here
        ("lora", "rank = 0", "lora.rank", "0", "greater than or equal to 1"),
        ("ppo", "clip_epsilon = 1.5", "ppo.clip_epsilon", "1.5", "less than 1"),
        ("kl", "coef = -0.1", "kl.coef", "-0.1", "greater than or equal to 0"),
        ("reward", "min_auroc = 0.5", "reward.min_auroc", "0.5", "greater than 0.5"),
        ("data", "heldout_share = 1.0", "data.heldout_share", "1.0", "less than 1"),
        ("evaluation", "bootstrap_resamples = 10", "evaluation.bootstrap_resamples", "10",
         "greater than or equal to 100"),
        ("run", "seed = -1", "run.seed", "-1", "greater than or equal to 0"),
        ("generation", "max_new_tokens = 1.5", "generation.max_new_tokens", "1.5", "valid integer"),
        ("reward", "scale = nan", "reward.scale", "nan", "finite number"),
        ("kl", "coef = inf", "kl.coef", "inf", "finite number"),
        ("base", 'device = "gpu"', "base.device", "'gpu'", "'auto', 'cpu' or 'cuda'"),
        ("data", 'bad_rows = "drop"', "data.bad_rows", "'drop'", "'error' or 'skip'"),
        ("reward", 'transform = "negative"', "reward.transform", "'negative'",
         "'neg-harm', 'logit-margin' or 'log-odds'"),
        # one line for both members of `str | list[str]`
        ("lora", "targets = 5", "lora.targets", "5", "valid string, or Input should be a valid list"),
    ],
)
def test_wrong_value_names_file_key_value_and_expectation(tmp_path, section, line, key, found, expected):
    path = write(tmp_path, "exp.toml", with_line(section, line))
    msg = config_error(path)
    assert f"{path.resolve()}: key '{key}' has value {found}; expected: " in msg and expected in msg


def test_union_member_tags_do_not_leak_into_key_names(tmp_path):
    msg = config_error(write(tmp_path, "exp.toml", with_line("lora", 'targets = [1, "q"]')))
    assert "'lora.targets[0]'" in msg and "list[str]" not in msg


def test_list_item_of_wrong_type_is_named_by_position(tmp_path):
    path = write(tmp_path, "exp.toml", GOOD.replace('["hostile"]', '["hostile", 2]'))
    msg = config_error(path)
    assert str(path) in msg and "'reward.harmful_labels[1]'" in msg and "valid string" in msg


@pytest.mark.parametrize(
    "extra, key, hint",
    [
        ("[lora]\nrnak = 4\n", "lora.rnak", "did you mean 'rank'?"),
        ("[ppo]\nminibtach = 4\n", "ppo.minibtach", "did you mean 'minibatch'?"),
        ("[evaluation.judge]\nsourse = \"x\"\n", "evaluation.judge.sourse", "did you mean 'source'?"),
        ("[ppoo]\nsteps = 3\n", "ppoo", "did you mean 'ppo'?"),  # unknown section
        ("[genration]\nmax_new_tokens = 3\n", "genration", "did you mean 'generation'?"),
    ],
)
def test_unknown_key_or_section_suggests_the_close_name(tmp_path, extra, key, hint):
    path = write(tmp_path, "exp.toml", GOOD + extra)
    msg = config_error(path)
    assert str(path) in msg and f"unknown key '{key}'" in msg and hint in msg and "keys allowed in" in msg


def test_missing_required_key_is_named_with_what_it_is(tmp_path):
    path = write(tmp_path, "exp.toml", GOOD.replace('prompts = "prompts.jsonl"', 'text_field = "q"'))
    msg = config_error(path)
    assert str(path) in msg and "required key 'data.prompts' is missing" in msg
    assert DataSection.model_fields["prompts"].description in msg


def test_missing_required_section(tmp_path):
    path = write(tmp_path, "exp.toml", GOOD.replace('[base]\nmodel = "acme/tiny-seq2seq"\n', ""))
    msg = config_error(path)
    assert "exp.toml" in msg and "required key 'base' is missing" in msg


@pytest.mark.parametrize("old, key", [('"acme/tiny-seq2seq"', "base.model"), ('"prompts.jsonl"', "data.prompts")])
def test_empty_names_are_refused_not_resolved_to_the_config_folder(tmp_path, old, key):
    path = write(tmp_path, "exp.toml", GOOD.replace(old, '""'))
    msg = config_error(path)
    assert f"'{key}' has value ''" in msg and "at least 1 character" in msg


def test_section_given_as_a_plain_value(tmp_path):
    # a plain value where a section belongs used to crash with AttributeError instead of a UserError
    path = write(tmp_path, "exp.toml", "run = 5\n" + GOOD)
    msg = config_error(path)
    assert str(path) in msg and "'run' has value 5" in msg and "valid dictionary" in msg


def test_missing_config_file(tmp_path):
    msg = config_error(tmp_path / "nowhere.toml")
    assert "nowhere.toml" in msg and "not found" in msg and "TOML" in msg


def test_config_path_is_a_folder(tmp_path):
    msg = config_error(tmp_path)
    assert str(tmp_path) in msg and "folder" in msg and "TOML" in msg


def test_not_toml(tmp_path):
    path = write(tmp_path, "exp.toml", "[base\nmodel = 'x'\n")
    msg = config_error(path)
    assert str(path) in msg and "not valid TOML" in msg and "line 1" in msg


def test_binary_file(tmp_path):
    path = tmp_path / "exp.toml"
    path.write_bytes(b"\xff\xfe\x00\x01binary\x89PNG")
    msg = config_error(path)
    assert str(path) in msg and "not a text file" in msg and "UTF-8" in msg


def test_extends_missing_file(tmp_path):
    path = write(tmp_path, "child.toml", 'extends = "missing-parent.toml"\n' + GOOD)
    msg = config_error(path)
    assert str(path) in msg and "'extends'" in msg and str(tmp_path / "missing-parent.toml") in msg
    assert "does not exist" in msg


def test_extends_must_be_a_file_name(tmp_path):
    msg = config_error(write(tmp_path, "child.toml", "extends = 3\n" + GOOD))
    assert "child.toml" in msg and "'extends'" in msg and "file name (string)" in msg


def test_extends_cycle_of_two_files(tmp_path):
    a = write(tmp_path, "a.toml", 'extends = "b.toml"\n' + GOOD)
    b = write(tmp_path, "b.toml", 'extends = "a.toml"\n')
    msg = config_error(a)
    assert "'extends' makes a cycle" in msg and f"{a} -> {b} -> {a}" in msg


def test_extends_itself(tmp_path):
    a = write(tmp_path, "a.toml", 'extends = "a.toml"\n' + GOOD)
    msg = config_error(a)
    assert f"{a}: key 'extends' makes a cycle: {a} -> {a}" in msg


def test_error_in_parent_file_names_the_parent(tmp_path):
    parent = write(tmp_path / "common", "parent.toml", GOOD + "\n[ppo]\nepochs = 0\n")
    child = write(tmp_path / "exps", "child.toml", 'extends = "../common/parent.toml"\n[kl]\ncoef = 0.2\n')
    msg = config_error(child)
    assert f"{parent.resolve()}: key 'ppo.epochs' has value 0" in msg and "greater than or equal to 1" in msg


@pytest.mark.parametrize("text", ["kl.coef", "=0.1", "kl..coef=0.1", " .coef=1", "kl.=1"])
def test_malformed_set(tmp_path, text):
    msg = config_error(write(tmp_path, "exp.toml", GOOD), [text])
    assert f"--set {text!r}" in msg and "KEY=VALUE" in msg


def test_set_below_a_value_set_in_the_file(tmp_path):
    path = write(tmp_path, "exp.toml", GOOD + "\n[kl]\ncoef = 0.2\n")
    msg = config_error(path, ["kl.coef.start=0.1"])
    assert "--set 'kl.coef.start=0.1'" in msg and "'kl.coef' is a value, not a section" in msg


def test_set_below_a_default_value_names_the_set(tmp_path):
    msg = config_error(write(tmp_path, "exp.toml", GOOD), ["kl.coef.start=0.1"])
    assert "--set kl.coef.start=0.1: key 'kl.coef' has value {'start': 0.1}" in msg and "valid number" in msg


@pytest.mark.parametrize(
    "text, key, expected",
    [
        ("ppo.steps=abc", "ppo.steps", "valid integer"),
        ("ppo.steps=2.5", "ppo.steps", "valid integer"),
        ("kl.coef=-1", "kl.coef", "greater than or equal to 0"),
        ("run.name=123", "run.name", "valid string"),  # TOML literal: 123 is a number, "'123'" a string
        ("reward.harmful_labels=hostile", "reward.harmful_labels", "valid list"),
    ],
)
def test_set_type_error_names_the_set(tmp_path, text, key, expected):
    msg = config_error(write(tmp_path, "exp.toml", GOOD), [text])
    assert f"--set {text}: key '{key}'" in msg and expected in msg


def test_set_unknown_key_names_the_set(tmp_path):
    msg = config_error(write(tmp_path, "exp.toml", GOOD), ["ppo.step=3"])
    assert "--set ppo.step=3: unknown key 'ppo.step'" in msg and "did you mean 'steps'?" in msg


def test_minibatch_must_divide_prompts_per_step(tmp_path):
    path = write(tmp_path, "exp.toml", GOOD + "\n[ppo]\nprompts_per_step = 12\nminibatch = 5\n")
    msg = config_error(path)
    # 4 is the largest divisor of 12 not above 5 (arithmetic)
    assert str(path) in msg and "[ppo]" in msg and "minibatch (5) must divide prompts_per_step (12)" in msg
    assert "try minibatch = 4" in msg


def test_minibatch_from_set_against_default_prompts_per_step(tmp_path):
    msg = config_error(write(tmp_path, "exp.toml", GOOD), ["ppo.minibatch=3"])
    assert "--set ppo.minibatch=3: [ppo] minibatch (3) must divide prompts_per_step (16)" in msg


def test_harmful_labels_and_index_together(tmp_path):
    path = write(tmp_path, "exp.toml", GOOD)
    msg = config_error(path, ["reward.harmful_index=1"])
    assert str(path) in msg and "--set reward.harmful_index=1" in msg and "[reward]" in msg
    assert "either harmful_labels or harmful_index, not both" in msg


def test_every_problem_is_listed_at_once(tmp_path):
    path = write(tmp_path, "exp.toml", GOOD + "\n[lora]\nrank = 0\ndropout = 1.0\n[kl]\ngain = 2.0\n")
    lines = config_error(path).splitlines()
    assert lines[0] == "invalid config:" and len(lines) == 4
    for key, line in zip(["'lora.rank'", "'lora.dropout'", "'kl.gain'"], lines[1:]):
        assert key in line and str(path.resolve()) in line


# ---------------------------------------------------------------- paths, extends, --set values


def test_relative_paths_resolve_against_the_config_folder(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)  # the working folder must not matter
    text = with_line("data", 'heldout = "sub/held.csv"').replace("[reward]\n", '[reward]\nprobes = ["probes/p.jsonl"]\n')
    path = write(tmp_path / "exps", "exp.toml", text + '\n[run]\nout = "../runs/a"\n')
    cfg = load_config(path)
    folder = (tmp_path / "exps").resolve()
    assert cfg.data.prompts == str(folder / "prompts.jsonl")
    assert cfg.data.heldout == str(folder / "sub" / "held.csv")
    assert cfg.reward.probes == [str(folder / "probes" / "p.jsonl")]
    assert cfg.run.out == str(tmp_path.resolve() / "runs" / "a")


def test_paths_from_an_extended_file_resolve_against_that_file(tmp_path):
    write(tmp_path / "common", "base.toml", GOOD + '\n[run]\nout = "runs"\n')
    child = write(tmp_path / "exps" / "deep", "child.toml",
                  'extends = "../../common/base.toml"\n[data]\nheldout = "held.jsonl"\n')
    cfg = load_config(child)
    assert cfg.data.prompts == str((tmp_path / "common" / "prompts.jsonl").resolve())
    assert cfg.run.out == str((tmp_path / "common" / "runs").resolve())
    assert cfg.data.heldout == str((tmp_path / "exps" / "deep" / "held.jsonl").resolve())  # the child's own
    assert cfg.base.model == "acme/tiny-seq2seq"
    assert cfg.run.name == "child"


def test_child_overrides_parent_keys_and_keeps_the_rest(tmp_path):
    write(tmp_path, "base.toml", GOOD + "\n[ppo]\nsteps = 7\nepochs = 2\n")
    child = write(tmp_path, "child.toml", 'extends = "base.toml"\n[ppo]\nsteps = 9\n[data]\nprompts = "other.csv"\n')
    cfg = load_config(child)
    assert (cfg.ppo.steps, cfg.ppo.epochs) == (9, 2)
    assert cfg.data.prompts == str((tmp_path / "other.csv").resolve())


def test_set_paths_resolve_against_the_working_folder(tmp_path, monkeypatch):
    path = write(tmp_path / "exps", "exp.toml", GOOD)
    work = tmp_path / "work"
    work.mkdir()
    monkeypatch.chdir(work)
    cfg = load_config(path, ["data.prompts=mine.jsonl", "ppo.steps=3", "run.name=trial"])
    assert cfg.data.prompts == str(work.resolve() / "mine.jsonl")
    assert (cfg.ppo.steps, cfg.run.name) == (3, "trial")


def test_cache_placeholder_expands(tmp_path, monkeypatch):
    monkeypatch.setenv("ALIGNRUN_CACHE", str(tmp_path / "cache"))
    assert cache_dir() == tmp_path / "cache"
    (tmp_path / "cache" / "demo" / "base").mkdir(parents=True)
    path = write(tmp_path / "exps", "exp.toml", GOOD.replace("acme/tiny-seq2seq", "{cache}/demo/base")
                 .replace("prompts.jsonl", "{cache}/demo/prompts.jsonl"))
    cfg = load_config(path)
    assert cfg.base.model == str(tmp_path / "cache" / "demo" / "base")
    assert cfg.data.prompts == str(tmp_path / "cache" / "demo" / "prompts.jsonl")


def test_cache_dir_default_follows_xdg(tmp_path, monkeypatch):
    monkeypatch.delenv("ALIGNRUN_CACHE", raising=False)
    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path))
    assert cache_dir() == tmp_path / "alignrun"


def test_hub_names_and_modules_are_left_alone_but_local_folders_resolve(tmp_path):
    (tmp_path / "local-model").mkdir()
    text = (GOOD.replace("acme/tiny-seq2seq", "local-model")
            + '\n[evaluation.judge]\nbackend = "sklearn"\nsource = "profanity_check.profanity_check:vectorizer,model"\n')
    cfg = load_config(write(tmp_path, "exp.toml", text))
    assert cfg.base.model == str((tmp_path / "local-model").resolve())  # exists next to the config
    assert cfg.reward.source == "acme/harm-classifier"  # hub-like name: not a path here
    assert cfg.evaluation.judge.source == "profanity_check.profanity_check:vectorizer,model"
    cfg = load_config(write(tmp_path, "dot.toml", GOOD.replace("acme/tiny-seq2seq", "./not-built-yet")))
    assert cfg.base.model == str((tmp_path / "not-built-yet").resolve())  # "./" always means a path


@pytest.mark.parametrize(
    "text, parts, value",
    [
        ("kl.coef=0.05", ["kl", "coef"], 0.05),
        ("ppo.steps = 3", ["ppo", "steps"], 3),
        ("ppo.whiten_advantages=false", ["ppo", "whiten_advantages"], False),
        ('reward.harmful_labels=["a", "b"]', ["reward", "harmful_labels"], ["a", "b"]),
        ("base.model=acme/model", ["base", "model"], "acme/model"),  # not a TOML literal: a bare string
        ("run.name='123'", ["run", "name"], "123"),
        ("run.out=", ["run", "out"], ""),
    ],
)
def test_parse_override_values_are_toml_literals(text, parts, value):
    assert parse_override(text) == (parts, value)


def test_apply_override_records_where_a_value_came_from():
    tree: dict = {"kl": {"coef": 0.1}}
    origin: dict[str, str] = {}
    apply_override(tree, "kl.target=6.0", origin)
    assert tree == {"kl": {"coef": 0.1, "target": 6.0}} and origin == {"kl.target": "--set kl.target=6.0"}


def test_with_overrides_validates_again(tmp_path):
    cfg = load_config(write(tmp_path, "exp.toml", GOOD))
    assert with_overrides(cfg, {"kl.coef": 0.3}).kl.coef == 0.3
    assert cfg.kl.coef == 0.1  # the original is untouched
    with pytest.raises(UserError, match=r"sweep: key 'kl.coef' has value -1"):
        with_overrides(cfg, {"kl.coef": -1})


# ---------------------------------------------------------------- command line


def test_cli_config_show_prints_toml_that_loads_back(tmp_path, capsys):
    path = write(tmp_path, "exp.toml", GOOD)
    assert main(["config", "show", str(path), "--set", "ppo.steps=5"]) == 0
    shown = capsys.readouterr().out
    again = load_config(write(tmp_path / "again", "exp.toml", shown))
    assert again.model_dump() == load_config(path, ["ppo.steps=5"]).model_dump()
    assert again.ppo.steps == 5


def test_cli_config_check_ok(tmp_path, capsys):
    path = write(tmp_path, "exp.toml", GOOD)
    write(tmp_path, "prompts.jsonl", '{"prompt": "a"}\n')  # config check also checks that named files exist
    assert main(["config", "check", str(path)]) == 0
    assert capsys.readouterr().out.strip() == f"{path}: ok"


@pytest.mark.parametrize(
    "make, args, needle",
    [
        (lambda d: write(d, "exp.toml", GOOD + "\n[lora]\nrank = 0\n"), [], "'lora.rank'"),
        (lambda d: d / "missing.toml", [], "not found"),
        (lambda d: write(d, "exp.toml", "not = [toml"), [], "not valid TOML"),
        (lambda d: write(d, "exp.toml", GOOD), ["--set", "ppo.steps"], "KEY=VALUE"),
    ],
)
@pytest.mark.parametrize("action", ["show", "check"])
def test_cli_config_errors_exit_2_without_traceback(tmp_path, capsys, make, args, needle, action):
    path = make(tmp_path)
    assert main(["config", action, str(path), *args]) == 2
    out, err = capsys.readouterr()
    assert out == "" and err.startswith("alignrun: error: ") and needle in err
    assert "Traceback" not in err


# ---------------------------------------------------------------- property: load -> to_toml -> load

finite = {"allow_nan": False, "allow_infinity": False}
names = st.text(min_size=1, max_size=20)
toml_int = st.integers(min_value=0, max_value=2**63 - 1)  # TOML integers are signed 64-bit


@st.composite
def valid_configs(draw) -> dict:
    minibatch = draw(st.integers(1, 64))
    reward: dict = {
        "source": draw(st.sampled_from(["acme/clf", "pkg.module:predict"])),
        "backend": draw(st.sampled_from(["hf", "sklearn", "callable"])),
        "transform": draw(st.sampled_from(["neg-harm", "logit-margin", "log-odds"])),
        "scale": draw(st.floats(-1e6, 1e6, **finite)),
        "shift": draw(st.floats(**finite)),
        "min_auroc": draw(st.floats(0.5, 1.0, exclude_min=True)),
        "combine": draw(st.sampled_from(["max", "noisy-or"])),
    }
    if draw(st.booleans()):
        reward["harmful_labels"] = draw(st.lists(names, min_size=1, max_size=3))
    else:
        reward["harmful_index"] = draw(st.integers(0, 1000))
    if draw(st.booleans()):
        reward["clip"] = draw(st.floats(min_value=0, exclude_min=True, **finite))
    tree: dict = {
        "base": {"model": draw(st.sampled_from(["acme/t5-tiny", "org/bart-small"])),
                 "device": draw(st.sampled_from(["auto", "cpu", "cuda"])),
                 "precision": draw(st.sampled_from(["fp32", "bf16"])), "threads": draw(st.integers(0, 1024)),
                 "trust_remote_code": draw(st.booleans())},
        "lora": {"rank": draw(st.integers(1, 1024)), "alpha": draw(st.floats(min_value=0, exclude_min=True, **finite)),
                 "dropout": draw(st.floats(0, 1, exclude_max=True)),
                 "targets": draw(st.one_of(st.sampled_from(["auto", "all-linear"]), st.lists(names, max_size=4)))},
        "reference": {"mode": draw(st.sampled_from(["adapters-off", "copy"]))},
        "reward": reward,
        "kl": {"coef": draw(st.floats(min_value=0, **finite)), "gain": draw(st.floats(0, 1, exclude_min=True))},
        "ppo": {"minibatch": minibatch, "prompts_per_step": minibatch * draw(st.integers(1, 64)),
                "steps": draw(st.integers(1, 1_000_000)), "epochs": draw(st.integers(1, 100)),
                "learning_rate": draw(st.floats(0, 1, exclude_min=True)),
                "clip_epsilon": draw(st.floats(0, 1, exclude_min=True, exclude_max=True)),
                "gamma": draw(st.floats(0, 1)), "gae_lambda": draw(st.floats(0, 1)),
                "whiten_advantages": draw(st.booleans())},
        "generation": {"max_new_tokens": draw(st.integers(1, 4096)), "max_prompt_tokens": draw(st.integers(1, 8192))},
        "data": {"prompts": draw(st.sampled_from(["p.jsonl", "data/p.csv", "/abs/p.parquet"])),
                 "text_field": draw(names), "heldout_share": draw(st.floats(0, 1, exclude_min=True, exclude_max=True)),
                 "bad_rows": draw(st.sampled_from(["error", "skip"])), "max_chars": draw(st.integers(1, 10**9))},
        "evaluation": {"samples_per_prompt": draw(st.integers(1, 1000)), "max_prompts": draw(toml_int),
                       "harm_threshold": draw(st.floats(0, 1, exclude_min=True, exclude_max=True)),
                       "bootstrap_resamples": draw(st.integers(100, 100_000))},
        "run": {"name": draw(names), "seed": draw(toml_int), "checkpoint_every": draw(st.integers(0, 10**6))},
    }
    if draw(st.booleans()):
        tree["kl"]["target"] = draw(st.floats(min_value=0, exclude_min=True, **finite))
    if draw(st.booleans()):
        tree["evaluation"]["judge"] = {"backend": "hf", "source": "acme/judge", "harmful_labels": ["toxic"]}
    if draw(st.booleans()):
        values = st.lists(st.one_of(st.integers(-1000, 1000), st.floats(**finite), names), min_size=1, max_size=3)
        tree["sweep"] = {"grid": draw(st.dictionaries(st.sampled_from(["kl.coef", "lora.rank", "ppo.steps"]), values)),
                         "seeds": draw(st.lists(st.integers(0, 100), max_size=3))}
    return tree


@settings(max_examples=60, deadline=None)
@given(valid_configs())
def test_round_trip_through_to_toml(tree):
    with tempfile.TemporaryDirectory() as first, tempfile.TemporaryDirectory() as second:
        path = Path(first) / "exp.toml"
        path.write_text(tomli_w.dumps(tree), encoding="utf-8")
        cfg = load_config(path)
        again_path = Path(second) / "again.toml"
        again_path.write_text(to_toml(cfg), encoding="utf-8")
        again = load_config(again_path)
    assert again.model_dump() == cfg.model_dump()
    # spot checks that values were taken from the file, not defaults
    assert cfg.ppo.prompts_per_step == tree["ppo"]["prompts_per_step"]
    assert cfg.run.name == tree["run"]["name"]
    assert math.isclose(cfg.reward.scale, tree["reward"]["scale"]) or cfg.reward.scale == tree["reward"]["scale"]
    assert isinstance(cfg, Experiment)
