"""Prompts: JSONL/CSV/Parquet files or a saved `datasets` folder -> checked texts -> train / held-out split.

Rows are numbered from 1: JSON Lines by line in the file (blank lines count), a JSON array by item,
CSV by data row after the header, Parquet and saved folders by row.
"""

from __future__ import annotations

import json
import tempfile
import warnings
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import datasets
import numpy as np
import pandas as pd

from alignrun.config import DataSection
from alignrun.errors import UserError

FORMATS = {".jsonl": "json", ".json": "json", ".csv": "csv", ".parquet": "parquet"}
_FORMAT_NAMES = {"json": "JSON Lines", "csv": "CSV", "parquet": "Parquet"}
LISTED = 20  # bad rows named one by one in an error message; the rest are counted
_SNIFF_BYTES = 8192  # a NUL byte this early marks a binary file (common practice, as in git and grep)
_MISSING = object()


@dataclass
class PromptSplit:
    train: list[str]
    heldout: list[str]
    skipped: list[dict] = field(default_factory=list)  # {"file", "row", "reason"} of rows left out
    source: dict = field(default_factory=dict)  # files, row counts, split rule and warnings, for the report


@dataclass
class _Table:
    values: list[tuple[int, Any]]  # (row number, value of the text field or _MISSING)
    fields: list[str]  # every field or column name seen
    unit: str  # what a row number counts: "line", "item" or "row"
    replaced_bytes: bool = False  # CSV only: invalid UTF-8 was read as U+FFFD


def load_prompts(section: DataSection, seed: int, per_step: int = 0) -> PromptSplit:
    """Read data.prompts (and data.heldout), drop duplicates, and split off held-out prompts by seed.

    Warnings (in .source["warnings"], for the screen and report.json): duplicates dropped, held-out prompts
    that also occur in training (compared after folding case and whitespace), and fewer distinct training
    prompts than one PPO step takes (per_step): the step then repeats prompts, which is allowed."""
    train, train_skipped, train_source = _read_for_key(section, "data.prompts", section.prompts)
    skipped = list(train_skipped)
    source: dict[str, Any] = {"prompts": train_source, "warnings": []}
    _warn_duplicates(source, "data.prompts", train_source)
    if section.heldout is not None:
        heldout, held_skipped, source["heldout"] = _read_for_key(section, "data.heldout", section.heldout)
        _warn_duplicates(source, "data.heldout", source["heldout"])
        skipped += held_skipped
        source["split"] = "explicit held-out file (data.heldout)"
    else:
        if len(train) < 2:
            raise UserError(
                f"[data.prompts] {section.prompts}: {len(train)} usable distinct prompt(s); at least 2 are "
                "needed to hold some out (add prompts, or give a separate file as data.heldout)"
            )
        n_held = min(max(round(len(train) * section.heldout_share), 1), len(train) - 1)
        held = set(np.random.default_rng(seed).permutation(len(train))[:n_held].tolist())
        heldout = [t for i, t in enumerate(train) if i in held]
        train = [t for i, t in enumerate(train) if i not in held]
        source["heldout"] = None
        source["split"] = f"shuffled by seed {seed}, data.heldout_share = {section.heldout_share}"
    source["train"], source["heldout_prompts"] = len(train), len(heldout)
    # the same prompt typed differently (case, spacing) is still a leak, also across a split of one file
    in_train = {_folded(t) for t in train}
    shared = [t for t in heldout if _folded(t) in in_train]
    source["heldout_overlap"] = {"shared": len(shared), "of": len(heldout), "share": len(shared) / len(heldout)}
    if shared:
        source["warnings"].append(
            f"{len(shared)} of {len(heldout)} held-out prompts ({100 * len(shared) / len(heldout):.0f}%) also "
            f"appear in the training prompts (e.g. {shared[0][:60]!r}); held-out results will look better than "
            "they are: remove them from one of the two files"
        )
    if len(train) < per_step:
        source["warnings"].append(
            f"only {len(train)} distinct training prompts but ppo.prompts_per_step = {per_step}: every step repeats "
            "prompts, so the policy learns from fewer examples than the step size suggests; add prompts or lower "
            "ppo.prompts_per_step"
        )
    return PromptSplit(train=train, heldout=heldout, skipped=skipped, source=source)


def _folded(text: str) -> str:
    return " ".join(text.split()).casefold()


def _warn_duplicates(source: dict[str, Any], key: str, info: dict[str, Any]) -> None:
    if info["duplicates"]:
        source["warnings"].append(
            f"[{key}] {info['file']}: {info['duplicates']} of {info['rows'] - info['skipped']} prompts dropped as "
            f"exact duplicates; {info['used']} distinct prompts are used"
        )


def _read_for_key(section: DataSection, key: str, path: str) -> tuple[list[str], list[dict], dict]:
    try:
        texts, skipped = read_prompt_file(path, section.text_field, section.bad_rows, section.max_chars)
    except UserError as exc:
        raise UserError(f"[{key}] {exc}", exc.exit_code) from None
    unique = list(dict.fromkeys(texts))
    if not unique:
        raise UserError(f"[{key}] {path}: every row was skipped as bad ({len(skipped)} rows); no prompts are left")
    info = {"file": path, "rows": len(texts) + len(skipped), "skipped": len(skipped),
            "duplicates": len(texts) - len(unique), "used": len(unique)}
    return unique, skipped, info


def read_prompt_file(path: str, text_field: str, bad_rows: str, max_chars: int) -> tuple[list[str], list[dict]]:
    """The prompt texts of one file or saved folder, in order, and the rows skipped (bad_rows = "skip")."""
    table = _read_table(Path(path), text_field)
    if not table.values:
        raise UserError(f"{path}: no rows (empty file); expected one prompt per row in field '{text_field}'")
    if text_field not in table.fields:
        raise UserError(
            f"{path}: no field '{text_field}' (data.text_field); fields found: {', '.join(table.fields) or 'none'}"
        )
    texts, bad = [], []
    for row, value in table.values:
        reason = _row_problem(value, text_field, max_chars, table.replaced_bytes)
        if reason:
            bad.append({"file": path, "row": row, "reason": reason})
        else:
            texts.append(value)
    if bad and bad_rows == "error":
        listed = "\n".join(f"  {table.unit} {b['row']}: {b['reason']}" for b in bad[:LISTED])
        more = f"\n  ... and {len(bad) - LISTED} more" if len(bad) > LISTED else ""
        raise UserError(
            f"{path}: {len(bad)} bad row(s) of {len(table.values)} in field '{text_field}':\n{listed}{more}\n"
            'fix them, or set data.bad_rows = "skip" to leave them out (they are listed in the report)'
        )
    return texts, bad


def _row_problem(value: Any, text_field: str, max_chars: int, replaced_bytes: bool) -> str | None:
    if value is _MISSING or value is None:
        return f"field '{text_field}' is missing or null"
    if not isinstance(value, str):
        return f"not text: {type(value).__name__} {str(value)[:40]!r}"
    if (replaced_bytes and "\ufffd" in value) or not _encodes(value):
        return "not valid UTF-8 text"
    if not value.strip():
        return "empty or whitespace-only text"
    if len(value) > max_chars:
        return f"{len(value)} characters, more than data.max_chars = {max_chars}"
    return None


def _encodes(text: str) -> bool:
    try:
        text.encode("utf-8")  # lone surrogates: undecodable bytes (surrogateescape) or bad \ud800 escapes
        return True
    except UnicodeEncodeError:
        return False


def _read_table(path: Path, text_field: str) -> _Table:
    if path.is_dir():
        return _read_saved_folder(path, text_field)
    if not path.is_file():
        raise UserError(f"{path}: no such file or folder")
    kind = FORMATS.get(path.suffix.lower())
    if kind is None:
        raise UserError(
            f"{path}: unknown file type '{path.suffix}'; expected .jsonl/.json (JSON Lines), .csv, .parquet, "
            "or a folder written by datasets' save_to_disk"
        )
    if path.stat().st_size == 0:
        return _Table([], [], "row")
    if kind != "parquet":
        with path.open("rb") as fh:
            if b"\0" in fh.read(_SNIFF_BYTES):
                raise UserError(f"{path}: binary data (NUL bytes), not a UTF-8 text {_FORMAT_NAMES[kind]} file")
    if kind == "json":
        return _read_json(path, text_field)
    return _read_with_datasets(path, kind, text_field)


def _read_json(path: Path, text_field: str) -> _Table:
    # Parsed here rather than by datasets: exact line numbers, and mixed types in other fields do no harm.
    text = path.read_bytes().decode("utf-8", errors="surrogateescape").removeprefix("\ufeff")
    if text.lstrip().startswith("["):
        try:
            items = list(enumerate(json.loads(text), 1))
        except json.JSONDecodeError as exc:
            raise UserError(f"{path}: not valid JSON: {exc.msg} (line {exc.lineno}, column {exc.colno})") from None
        unit = "item"
    else:
        items, broken = [], []
        for n, line in enumerate(text.split("\n"), 1):
            if line.strip():
                try:
                    items.append((n, json.loads(line)))
                except json.JSONDecodeError as exc:
                    broken.append(f"line {n}: {exc.msg} (column {exc.colno})")
        if broken:
            more = f"; and {len(broken) - LISTED} more" if len(broken) > LISTED else ""
            raise UserError(f"{path}: not valid JSON Lines: {'; '.join(broken[:LISTED])}{more}")
        unit = "line"
    not_objects = [f"{unit} {n}" for n, item in items if not isinstance(item, dict)]
    if not_objects:
        raise UserError(
            f"{path}: {', '.join(not_objects[:LISTED])}: not a JSON object; expected one object per {unit} "
            f'like {{"{text_field}": "..."}}'
        )
    fields = list(dict.fromkeys(k for _, item in items for k in item))
    return _Table([(n, item.get(text_field, _MISSING)) for n, item in items], fields, unit)


def _read_with_datasets(path: Path, kind: str, text_field: str) -> _Table:
    options: dict[str, Any] = {}
    replaced = False
    if kind == "csv":
        replaced = not _is_utf8(path)
        # the text column stays text ("42", "NA" and "null" are prompts); an empty cell is missing
        options = {"converters": {text_field: str}, "keep_default_na": False, "na_values": [""],
                   "index_col": False, "encoding": "utf-8-sig", "encoding_errors": "replace" if replaced else "strict"}
    with _quiet_datasets(), tempfile.TemporaryDirectory(prefix="alignrun-data-") as cache:
        try:
            with warnings.catch_warnings():
                # pandas only warns (and drops fields) when the first data row is longer than the header
                warnings.simplefilter("error", pd.errors.ParserWarning)
                ds = datasets.load_dataset(kind, data_files=str(path), split="train", cache_dir=cache,
                                           keep_in_memory=True, **options)
        except ValueError as exc:
            if "corresponds to no data" not in str(exc):  # datasets' words for a file without rows
                raise UserError(f"{path}: could not be read as {_FORMAT_NAMES[kind]}: {_cause(exc)}") from None
            return _Table([], [], "row")
        except Exception as exc:  # datasets wraps pandas/pyarrow parser errors of every kind
            raise UserError(f"{path}: could not be read as {_FORMAT_NAMES[kind]}: {_cause(exc)}") from None
    return _table_of(ds, text_field, replaced)


def _read_saved_folder(path: Path, text_field: str) -> _Table:
    with _quiet_datasets():
        try:
            ds = datasets.load_from_disk(str(path), keep_in_memory=True)
        except Exception as exc:  # FileNotFoundError for a plain folder, arrow errors for damaged ones
            raise UserError(
                f"{path}: not a folder written by datasets' save_to_disk ({_cause(exc)}); "
                "for files, name the file itself"
            ) from None
    if isinstance(ds, datasets.DatasetDict):
        if len(ds) != 1:
            raise UserError(
                f"{path}: a saved DatasetDict with splits {', '.join(ds)}; save the one split you want "
                "with Dataset.save_to_disk"
            )
        ds = next(iter(ds.values()))
    return _table_of(ds, text_field, False)


def _table_of(ds: datasets.Dataset, text_field: str, replaced_bytes: bool) -> _Table:
    values = list(ds[text_field]) if text_field in ds.column_names else [_MISSING] * len(ds)
    return _Table(list(enumerate(values, 1)), list(ds.column_names), "row", replaced_bytes)


def _is_utf8(path: Path) -> bool:
    try:
        path.read_bytes().decode("utf-8")
        return True
    except UnicodeDecodeError:
        return False


def _cause(exc: BaseException) -> str:
    """The innermost message: datasets says only 'An error occurred while generating the dataset'."""
    while exc.__cause__ is not None:
        exc = exc.__cause__
    return f"{type(exc).__name__}: {str(exc).strip()}"


@contextmanager
def _quiet_datasets() -> Iterator[None]:
    """No progress bars or error logs from datasets while it reads user files; both restored after."""
    verbosity, bars = datasets.logging.get_verbosity(), datasets.is_progress_bar_enabled()
    datasets.logging.set_verbosity(datasets.logging.CRITICAL)
    datasets.disable_progress_bars()
    try:
        yield
    finally:
        datasets.logging.set_verbosity(verbosity)
        if bars:
            datasets.enable_progress_bars()
