"""alignrun.data: each prompt format, bad rows (error and skip), bad files, and the seeded train/held-out split."""

from __future__ import annotations

import csv
import json
import tempfile
from pathlib import Path

import datasets
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from alignrun.config import DataSection
from alignrun.data import LISTED, load_prompts, read_prompt_file
from alignrun.errors import UserError

PROMPTS = ["Where is my parcel?", "The printer on floor 2 jams again.", "Can I move my booking to Friday?",
           "Reset my badge, please.", "Why was I charged twice?", "The lift is stuck, again!"]


def jsonl(path: Path, rows: list[dict]) -> Path:
    path.write_text("".join(json.dumps(r, ensure_ascii=False) + "\n" for r in rows), encoding="utf-8")
    return path


def csv_file(path: Path, rows: list[dict], fields: list[str]) -> Path:
    with path.open("w", encoding="utf-8", newline="") as fh:
        writer = csv.DictWriter(fh, fieldnames=fields)
        writer.writeheader()
        writer.writerows(rows)
    return path


def parquet(path: Path, columns: dict) -> Path:
    datasets.Dataset.from_dict(columns).to_parquet(str(path))
    return path


def saved(path: Path, columns: dict) -> Path:
    datasets.Dataset.from_dict(columns).save_to_disk(str(path))
    return path


def read(path: Path, bad_rows: str = "error", field: str = "prompt", max_chars: int = 200):
    return read_prompt_file(str(path), field, bad_rows, max_chars)


def read_error(path: Path, **kw) -> str:
    with pytest.raises(UserError) as info:
        read(path, **kw)
    return str(info.value)


def section(prompts: Path, **kw) -> DataSection:
    return DataSection(prompts=str(prompts), **kw)


# ---------------------------------------------------------------- formats


def test_jsonl_keeps_order_and_ignores_other_fields(tmp_path):
    path = jsonl(tmp_path / "p.jsonl", [{"prompt": p, "id": i, "meta": [i] if i % 2 else "x"}
                                        for i, p in enumerate(PROMPTS)])
    assert read(path) == (PROMPTS, [])


def test_json_array_file(tmp_path):
    path = tmp_path / "p.json"
    path.write_text(json.dumps([{"prompt": p} for p in PROMPTS]), encoding="utf-8")
    assert read(path) == (PROMPTS, [])


def test_jsonl_with_byte_order_mark_blank_lines_and_crlf(tmp_path):
    path = tmp_path / "p.jsonl"
    path.write_bytes(b"\xef\xbb\xbf" + b'{"prompt": "one"}\r\n\r\n{"prompt": "two\\u2028three"}\r\n')
    assert read(path) == (["one", "two\u2028three"], [])


def test_csv_text_column_stays_text(tmp_path):
    # numbers, NA-like words, quoted commas and newlines are prompts as written
    texts = ["42", "NA", "null", "Refund, please", 'She said "no"', "line one\nline two"]
    path = csv_file(tmp_path / "p.csv", [{"id": i, "prompt": t} for i, t in enumerate(texts)], ["id", "prompt"])
    assert read(path) == (texts, [])


def test_csv_with_byte_order_mark(tmp_path):
    path = tmp_path / "p.csv"
    path.write_bytes(b"\xef\xbb\xbfprompt\nhello\n")
    assert read(path) == (["hello"], [])


def test_parquet(tmp_path):
    path = parquet(tmp_path / "p.parquet", {"prompt": PROMPTS, "n": list(range(len(PROMPTS)))})
    assert read(path) == (PROMPTS, [])


def test_saved_folder(tmp_path):
    path = saved(tmp_path / "saved", {"prompt": PROMPTS})
    assert read(path) == (PROMPTS, [])


def test_saved_dataset_dict_with_one_split(tmp_path):
    datasets.DatasetDict({"train": datasets.Dataset.from_dict({"prompt": PROMPTS})}).save_to_disk(str(tmp_path / "d"))
    assert read(tmp_path / "d") == (PROMPTS, [])


def test_saved_dataset_dict_with_several_splits_is_refused(tmp_path):
    part = datasets.Dataset.from_dict({"prompt": PROMPTS})
    datasets.DatasetDict({"train": part, "test": part}).save_to_disk(str(tmp_path / "d"))
    msg = read_error(tmp_path / "d")
    assert str(tmp_path / "d") in msg and "train, test" in msg and "save the one split" in msg


def test_other_text_field(tmp_path):
    path = jsonl(tmp_path / "p.jsonl", [{"question": p} for p in PROMPTS])
    assert read(path, field="question") == (PROMPTS, [])


def test_datasets_state_is_restored_and_nothing_is_printed(tmp_path, capfd):
    before = (datasets.logging.get_verbosity(), datasets.is_progress_bar_enabled())
    path = csv_file(tmp_path / "p.csv", [{"prompt": p} for p in PROMPTS], ["prompt"])
    capfd.readouterr()
    read(path)
    bad = tmp_path / "bad.csv"
    bad.write_text("prompt,x\nok,1\nbroken,2,3,4\n", encoding="utf-8")
    read_error(bad)
    assert capfd.readouterr() == ("", "")  # no progress bars, no datasets error log
    assert (datasets.logging.get_verbosity(), datasets.is_progress_bar_enabled()) == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["bad.csv", "p.csv"]  # no cache files beside the data


# ---------------------------------------------------------------- bad rows

# (value of the text field, the reason's words); rows 1 and 4 of each table below are good
BAD = [(None, "missing or null"), ("   \t", "empty or whitespace-only"), ("x" * 201, "201 characters, more than data.max_chars = 200")]


def bad_rows_table() -> list:
    return ["fine one", BAD[0][0], BAD[1][0], "fine two", BAD[2][0]]


def make_jsonl(tmp_path: Path, values: list) -> Path:
    return jsonl(tmp_path / "p.jsonl", [{"prompt": v} for v in values])


def make_csv(tmp_path: Path, values: list) -> Path:
    return csv_file(tmp_path / "p.csv", [{"n": i, "prompt": "" if v is None else v} for i, v in enumerate(values)],
                    ["n", "prompt"])


def make_parquet(tmp_path: Path, values: list) -> Path:
    return parquet(tmp_path / "p.parquet", {"prompt": values})


def make_saved(tmp_path: Path, values: list) -> Path:
    return saved(tmp_path / "saved", {"prompt": values})


MAKERS = [make_jsonl, make_csv, make_parquet, make_saved]
UNIT = {make_jsonl: "line", make_csv: "row", make_parquet: "row", make_saved: "row"}


@pytest.mark.parametrize("make", MAKERS, ids=lambda m: m.__name__)
def test_bad_rows_error_lists_rows_and_reasons(tmp_path, make):
    path = make(tmp_path, bad_rows_table())
    msg = read_error(path)
    assert str(path) in msg and "3 bad row(s) of 5" in msg and 'data.bad_rows = "skip"' in msg
    unit = UNIT[make]
    assert f"{unit} 2: field 'prompt' is missing or null" in msg or f"{unit} 2: empty" in msg  # CSV: empty cell
    assert f"{unit} 3: empty or whitespace-only text" in msg
    assert f"{unit} 5: {BAD[2][1]}" in msg
    assert f"{unit} 1:" not in msg and f"{unit} 4:" not in msg


@pytest.mark.parametrize("make", MAKERS, ids=lambda m: m.__name__)
def test_bad_rows_skip_keeps_the_good_ones_and_records_the_rest(tmp_path, make):
    path = make(tmp_path, bad_rows_table())
    texts, skipped = read(path, bad_rows="skip")
    assert texts == ["fine one", "fine two"]
    assert [s["row"] for s in skipped] == [2, 3, 5]
    assert all(s["file"] == str(path) for s in skipped)
    assert "201 characters" in skipped[2]["reason"]


def test_non_text_values_in_json_and_parquet(tmp_path):
    path = jsonl(tmp_path / "p.jsonl", [{"prompt": "ok"}, {"prompt": 5}, {"prompt": ["a"]}, {"prompt": {"x": 1}}])
    msg = read_error(path)
    assert "line 2: not text: int" in msg and "line 3: not text: list" in msg and "line 4: not text: dict" in msg
    path = parquet(tmp_path / "p.parquet", {"prompt": [1, 2, 3]})
    assert [s["row"] for s in read(path, bad_rows="skip")[1]] == [1, 2, 3]


def test_missing_field_in_some_rows(tmp_path):
    path = jsonl(tmp_path / "p.jsonl", [{"prompt": "a"}, {"other": "b"}, {"prompt": "c"}])
    msg = read_error(path)
    assert "line 2: field 'prompt' is missing or null" in msg


def test_invalid_utf8_rows(tmp_path):
    path = tmp_path / "p.jsonl"
    path.write_bytes(b'{"prompt": "good"}\n{"prompt": "caf\xe9"}\n{"prompt": "\\ud800 lone surrogate"}\n'
                     b'{"prompt": "also good", "note": "\xff"}\n')
    msg = read_error(path)
    assert "line 2: not valid UTF-8 text" in msg and "line 3: not valid UTF-8 text" in msg and "line 4" not in msg
    assert read(path, bad_rows="skip")[0] == ["good", "also good"]
    path = tmp_path / "p.csv"
    path.write_bytes(b"prompt,note\ngood,x\ncaf\xe9,y\nalso good,\xff\n")
    texts, skipped = read(path, bad_rows="skip")
    assert texts == ["good", "also good"] and [(s["row"], s["reason"]) for s in skipped] == [(2, "not valid UTF-8 text")]


def test_only_the_first_rows_are_listed_then_counted(tmp_path):
    path = make_jsonl(tmp_path, ["ok"] + [" "] * (LISTED + 5))
    msg = read_error(path)
    assert f"{LISTED + 5} bad row(s)" in msg and "... and 5 more" in msg
    assert f"line {LISTED + 1}:" in msg and f"line {LISTED + 2}:" not in msg


def test_huge_row(tmp_path):
    huge = "word " * 400_000  # 2 MB in one row
    path = make_jsonl(tmp_path, ["ok", huge])
    msg = read_error(path, max_chars=2000)
    assert f"line 2: {len(huge)} characters, more than data.max_chars = 2000" in msg
    assert read(path, max_chars=len(huge))[0] == ["ok", huge]


# ---------------------------------------------------------------- bad files


@pytest.mark.parametrize("name, content", [("p.jsonl", b""), ("p.jsonl", b"\n\n  \n"), ("p.json", b"[]"),
                                           ("p.csv", b""), ("p.csv", b"prompt\n"), ("p.parquet", b"")])
def test_empty_file(tmp_path, name, content):
    path = tmp_path / name
    path.write_bytes(content)
    msg = read_error(path)
    assert str(path) in msg and "no rows (empty file)" in msg


def test_parquet_without_rows(tmp_path):
    path = parquet(tmp_path / "p.parquet", {"prompt": []})
    assert "no rows (empty file)" in read_error(path)


@pytest.mark.parametrize("name", ["p.jsonl", "p.csv", "p.json"])
def test_binary_text_file(tmp_path, name):
    path = tmp_path / name
    path.write_bytes(bytes(range(256)) * 4)
    msg = read_error(path)
    assert str(path) in msg and "binary data (NUL bytes)" in msg and "UTF-8" in msg


def test_binary_parquet(tmp_path):
    path = tmp_path / "p.parquet"
    path.write_bytes(b"PAR1 but not really" * 20)
    msg = read_error(path)
    assert str(path) in msg and "could not be read as Parquet" in msg and "ArrowInvalid" in msg


def test_malformed_json_lines_are_named(tmp_path):
    path = tmp_path / "p.jsonl"
    path.write_text('{"prompt": "a"}\n{"prompt": "b",}\n{"prompt": "c"}\n{"prompt": \n', encoding="utf-8")
    msg = read_error(path, bad_rows="skip")  # malformed JSON is a broken file, not a bad row
    assert str(path) in msg and "not valid JSON Lines" in msg and "line 2:" in msg and "line 4:" in msg
    assert "line 1" not in msg and "line 3" not in msg


def test_malformed_json_array(tmp_path):
    path = tmp_path / "p.json"
    path.write_text('[{"prompt": "a"},\n {"prompt": }]', encoding="utf-8")
    msg = read_error(path)
    assert str(path) in msg and "not valid JSON" in msg and "line 2" in msg


def test_json_lines_that_are_not_objects(tmp_path):
    path = tmp_path / "p.jsonl"
    path.write_text('{"prompt": "a"}\n"just a string"\n[1, 2]\n', encoding="utf-8")
    msg = read_error(path)
    assert "line 2, line 3: not a JSON object" in msg and '{"prompt": "..."}' in msg


def test_ragged_csv(tmp_path):
    path = tmp_path / "p.csv"
    path.write_text("prompt,x\nhello, world,1\nok,2\n", encoding="utf-8")  # an unquoted comma
    msg = read_error(path)
    assert str(path) in msg and "could not be read as CSV" in msg


@pytest.mark.parametrize(
    "make, found",
    [
        (lambda d: jsonl(d / "p.jsonl", [{"text": "a", "id": 1}, {"text": "b", "lang": "en"}]), "text, id, lang"),
        (lambda d: csv_file(d / "p.csv", [{"text": "a", "id": 1}], ["text", "id"]), "text, id"),
        (lambda d: parquet(d / "p.parquet", {"question": ["a"], "id": [1]}), "question, id"),
        (lambda d: saved(d / "saved", {"question": ["a"]}), "question"),
    ],
)
def test_wrong_field_lists_the_fields_found(tmp_path, make, found):
    path = make(tmp_path)
    msg = read_error(path)
    assert str(path) in msg and "no field 'prompt' (data.text_field)" in msg and f"fields found: {found}" in msg


def test_missing_file_unknown_type_and_plain_folder(tmp_path):
    assert "no such file or folder" in read_error(tmp_path / "nowhere.jsonl")
    (tmp_path / "p.txt").write_text("hello\n")
    msg = read_error(tmp_path / "p.txt")
    assert "unknown file type '.txt'" in msg and ".jsonl" in msg and ".parquet" in msg
    (tmp_path / "folder").mkdir()
    assert "not a folder written by datasets' save_to_disk" in read_error(tmp_path / "folder")


def test_load_prompts_errors_name_the_config_key(tmp_path):
    good = make_jsonl(tmp_path, PROMPTS)
    with pytest.raises(UserError, match=r"^\[data\.prompts\] .*nowhere\.jsonl: no such file"):
        load_prompts(section(tmp_path / "nowhere.jsonl"), seed=0)
    bad = tmp_path / "held.csv"
    bad.write_text("question\nx\n")
    with pytest.raises(UserError, match=r"^\[data\.heldout\] .*held\.csv: no field 'prompt'"):
        load_prompts(section(good, heldout=str(bad)), seed=0)


def test_every_row_skipped_is_an_error(tmp_path):
    path = make_jsonl(tmp_path, [" ", None])
    with pytest.raises(UserError, match=r"\[data\.prompts\] .*every row was skipped"):
        load_prompts(section(path, bad_rows="skip"), seed=0)


# ---------------------------------------------------------------- split


def many(n: int) -> list[str]:
    return [f"ticket {i}: the portal shows error {i * 7 % 13}" for i in range(n)]


def test_split_is_deterministic_by_seed_and_a_partition(tmp_path):
    path = make_jsonl(tmp_path, many(50))
    first = load_prompts(section(path, heldout_share=0.2), seed=3)
    again = load_prompts(section(path, heldout_share=0.2), seed=3)
    other = load_prompts(section(path, heldout_share=0.2), seed=4)
    assert (first.train, first.heldout) == (again.train, again.heldout)
    assert set(first.heldout) != set(other.heldout)
    assert len(first.heldout) == 10 and len(first.train) == 40  # 0.2 * 50
    assert set(first.train).isdisjoint(first.heldout) and set(first.train) | set(first.heldout) == set(many(50))
    assert first.source["split"].startswith("shuffled by seed 3")


@pytest.mark.parametrize("n, share, held", [(2, 0.2, 1), (3, 0.01, 1), (3, 0.99, 2), (10, 0.22, 2), (10, 0.38, 4)])
def test_heldout_size_is_rounded_and_leaves_one_on_each_side(tmp_path, n, share, held):
    split = load_prompts(section(make_jsonl(tmp_path, many(n)), heldout_share=share), seed=0)
    assert (len(split.train), len(split.heldout)) == (n - held, held)


def test_fewer_than_two_usable_prompts(tmp_path):
    path = make_jsonl(tmp_path, ["same", "same", " "])
    with pytest.raises(UserError, match=r"\[data\.prompts\] .*1 usable distinct prompt\(s\); at least 2"):
        load_prompts(section(path, bad_rows="skip"), seed=0)


def test_duplicates_never_straddle_the_split(tmp_path):
    texts = many(10) * 3  # every prompt three times
    path = make_jsonl(tmp_path, texts)
    for seed in range(5):
        split = load_prompts(section(path, heldout_share=0.5), seed=seed)
        assert set(split.train).isdisjoint(split.heldout)
        assert sorted(split.train + split.heldout) == sorted(many(10))
    assert split.source["prompts"] == {"file": str(path), "rows": 30, "skipped": 0, "duplicates": 20, "used": 10}


def test_explicit_heldout_file(tmp_path):
    train = make_jsonl(tmp_path, many(6) + [many(6)[0]])
    held = csv_file(tmp_path / "held.csv", [{"prompt": p} for p in ["new one", "new two", "new one"]], ["prompt"])
    split = load_prompts(section(train, heldout=str(held), heldout_share=0.5), seed=7)
    assert split.train == many(6) and split.heldout == ["new one", "new two"]
    assert split.source["heldout"]["duplicates"] == 1
    assert [w.split(": ", 1)[1] for w in split.source["warnings"]] == [  # one note per file with duplicates
        "1 of 7 prompts dropped as exact duplicates; 6 distinct prompts are used",
        "1 of 3 prompts dropped as exact duplicates; 2 distinct prompts are used"]
    assert split.source["heldout_overlap"] == {"shared": 0, "of": 2, "share": 0.0}
    assert split.source["split"] == "explicit held-out file (data.heldout)"


def test_heldout_file_sharing_prompts_with_training_warns(tmp_path):
    train = make_jsonl(tmp_path, many(6))
    held = jsonl(tmp_path / "held.jsonl", [{"prompt": many(6)[2]}, {"prompt": "fresh"}])
    split = load_prompts(section(train, heldout=str(held)), seed=0)
    assert split.heldout == [many(6)[2], "fresh"]
    assert len(split.source["warnings"]) == 1 and "1 of 2 held-out prompts (50%) also appear" in split.source["warnings"][0]
    assert split.source["heldout_overlap"] == {"shared": 1, "of": 2, "share": 0.5}


def test_heldout_file_identical_to_training_file_is_all_overlap(tmp_path):
    train = make_jsonl(tmp_path, many(6))
    split = load_prompts(section(train, heldout=str(train)), seed=0)
    assert split.source["heldout_overlap"] == {"shared": 6, "of": 6, "share": 1.0}
    assert "6 of 6 held-out prompts (100%) also appear in the training prompts" in split.source["warnings"][0]


def test_overlap_ignores_case_and_spacing(tmp_path):
    # the same prompt typed differently is still a leak (folding case and whitespace: common practice)
    train = make_jsonl(tmp_path, ["Where is my bike?", "Brake pads squeal"])
    held = jsonl(tmp_path / "held.jsonl", [{"prompt": "where  is my BIKE?"}, {"prompt": "Chain slips"}])
    assert load_prompts(section(train, heldout=str(held)), seed=0).source["heldout_overlap"]["shared"] == 1


def test_a_split_of_one_file_reports_no_overlap_and_catches_retyped_copies(tmp_path):
    clean = load_prompts(section(make_jsonl(tmp_path, many(10))), seed=0)
    assert clean.source["heldout_overlap"] == {"shared": 0, "of": 2, "share": 0.0} and clean.source["warnings"] == []
    path = jsonl(tmp_path / "retyped.jsonl", [{"prompt": p} for p in many(10) + [m.upper() for m in many(10)]])
    split = load_prompts(section(path, heldout_share=0.5), seed=0)  # 20 distinct strings, 10 prompts
    assert split.source["heldout_overlap"]["shared"] > 0  # a prompt and its upper-case copy on both sides


def test_forty_copies_of_one_prompt_are_counted(tmp_path):
    path = make_jsonl(tmp_path, ["Fix my flat tyre"] * 40 + many(3))
    split = load_prompts(section(path, heldout_share=0.3), seed=0)
    assert sorted(split.train + split.heldout) == sorted(["Fix my flat tyre", *many(3)])
    assert split.source["warnings"] == [
        f"[data.prompts] {path}: 39 of 43 prompts dropped as exact duplicates; 4 distinct prompts are used"]


def test_fewer_distinct_prompts_than_one_step_needs_warns(tmp_path):
    path = make_jsonl(tmp_path, many(10))  # 8 train + 2 held out
    short = load_prompts(section(path), seed=0, per_step=16)
    assert short.source["warnings"] == [
        "only 8 distinct training prompts but ppo.prompts_per_step = 16: every step repeats prompts, so the policy "
        "learns from fewer examples than the step size suggests; add prompts or lower ppo.prompts_per_step"]
    assert load_prompts(section(path), seed=0, per_step=8).source["warnings"] == []


@pytest.mark.slow
def test_overlap_is_on_screen_and_in_the_report(tmp_path, tiny_models, capsys):
    from alignrun.cli import main
    from tests import tiny_run

    prompts = tiny_run.write_prompts(tmp_path / "prompts.jsonl")
    body = tiny_run.tiny_config(tiny_models["t5"], prompts, steps=1)
    body["data"]["heldout"] = str(prompts)  # the held-out file is the training file
    config = tiny_run.write_config(tmp_path / "exp.toml", body)
    assert main(["run", str(config), "--out", str(tmp_path / "run"), "--quiet"]) == 0
    assert "warning: 24 of 24 held-out prompts (100%) also appear in the training prompts" in capsys.readouterr().out
    data = json.loads((tmp_path / "run" / "report.json").read_text())["data"]
    assert data["heldout_overlap"] == {"shared": 24, "of": 24, "share": 1.0}
    assert any("100%" in w for w in data["warnings"])


def test_skipped_rows_from_both_files_are_reported(tmp_path):
    train = make_jsonl(tmp_path, ["a", " ", "b"])
    held = jsonl(tmp_path / "held.jsonl", [{"prompt": None}, {"prompt": "c"}])
    split = load_prompts(section(train, heldout=str(held), bad_rows="skip"), seed=0)
    assert [(Path(s["file"]).name, s["row"]) for s in split.skipped] == [("p.jsonl", 2), ("held.jsonl", 1)]
    assert split.source["prompts"]["skipped"] == 1 and split.source["heldout"]["skipped"] == 1


# ---------------------------------------------------------------- properties

prompt_text = st.text(min_size=1, max_size=80).filter(lambda t: t.strip() != "")


@settings(max_examples=80, deadline=None)
@given(texts=st.lists(prompt_text, min_size=2, max_size=30), seed=st.integers(0, 2**32 - 1),
       share=st.floats(0.05, 0.95))
def test_jsonl_round_trip_and_split_partition(texts, seed, share):
    with tempfile.TemporaryDirectory() as folder:
        path = jsonl(Path(folder) / "p.jsonl", [{"prompt": t} for t in texts])
        assert read(path, max_chars=80) == (texts, [])
        unique = list(dict.fromkeys(texts))
        if len(unique) < 2:
            with pytest.raises(UserError):
                load_prompts(section(path, heldout_share=share), seed=seed)
            return
        split = load_prompts(section(path, heldout_share=share), seed=seed)
    assert set(split.train).isdisjoint(split.heldout)
    assert sorted(split.train + split.heldout) == sorted(unique)  # each distinct prompt exactly once
    assert split.train and split.heldout
    assert split.source["prompts"]["duplicates"] == len(texts) - len(unique)


@settings(max_examples=15, deadline=None)
@given(texts=st.lists(prompt_text.filter(lambda t: "\0" not in t), min_size=1, max_size=8))  # NUL: binary file
def test_csv_round_trip(texts):
    with tempfile.TemporaryDirectory() as folder:
        path = csv_file(Path(folder) / "p.csv", [{"prompt": t, "n": i} for i, t in enumerate(texts)], ["prompt", "n"])
        assert read(path, max_chars=80) == (texts, [])
