"""Shared fixtures: no network, and tiny models built once per test session (never downloaded)."""

from __future__ import annotations

import os
from pathlib import Path

import pytest

os.environ.setdefault("HF_HUB_OFFLINE", "1")
os.environ.setdefault("HF_DATASETS_OFFLINE", "1")
os.environ.setdefault("TRANSFORMERS_OFFLINE", "1")
os.environ.setdefault("HF_EVALUATE_OFFLINE", "1")
os.environ.setdefault("TOKENIZERS_PARALLELISM", "false")


@pytest.fixture(scope="session")
def tiny_models(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    """A trained scenario tokenizer and random tiny T5 and BART models in standard HF folders."""
    from alignrun.demo import scenario
    from alignrun.demo.build import build_tiny_seq2seq, build_tokenizer

    root = tmp_path_factory.mktemp("tiny")
    texts = [t for pair in scenario.base_pairs(n=400, seed=0) for t in (pair.prompt, pair.reply)]
    tok = build_tokenizer(texts, root / "tokenizer")
    return {"tokenizer": tok, "t5": build_tiny_seq2seq(root / "t5", "t5", tok, seed=0),
            "bart": build_tiny_seq2seq(root / "bart", "bart", tok, seed=0)}


@pytest.fixture(scope="session")
def demo_models():
    """The demo's base model and classifier, built once into the alignrun cache (reused across sessions)."""
    from alignrun.demo.build import build_demo

    return build_demo()
