"""The offline demo: an invented repair co-operative's customer desk, its tiny models and prompt files."""

from alignrun.demo.build import (
    CLASSIFIER_LABELS,
    DemoPaths,
    build_demo,
    build_tiny_seq2seq,
    build_tokenizer,
    cached_folder,
)

__all__ = ["CLASSIFIER_LABELS", "DemoPaths", "build_demo", "build_tiny_seq2seq", "build_tokenizer", "cached_folder"]
