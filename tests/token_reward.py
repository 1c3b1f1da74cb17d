"""A `module:function` reward backend for tests: harm falls as a chosen word occurs more often in a reply."""

from __future__ import annotations

import numpy as np

_WORD = {"word": "order"}


def configure(word: str) -> None:
    _WORD["word"] = word.lower()


def harm(texts: list[str]) -> np.ndarray:
    return np.array([1.0 - min(1.0, text.lower().count(_WORD["word"]) / 3) for text in texts])
