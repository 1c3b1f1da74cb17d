"""A `module:function` reward backend for tests: harm falls as chosen words occur more often in a reply."""

from __future__ import annotations

import numpy as np

_WORDS = {"words": ("order",)}


def configure(*words: str) -> None:
    _WORDS["words"] = tuple(w.lower() for w in words)


def harm(texts: list[str]) -> np.ndarray:
    hits = [sum(text.lower().split().count(w) for w in _WORDS["words"]) for text in texts]
    return np.array([1.0 - min(1.0, h / 3) for h in hits])
