"""The small interface every embedder offers, and the hashing helpers the cache keys on."""

from __future__ import annotations

import hashlib
from collections.abc import Sequence
from typing import Protocol

import numpy as np


class TokenCounter(Protocol):
    def count(self, text: str) -> int: ...

    def offsets(self, text: str) -> list[tuple[int, int]]: ...


class Embedder(Protocol):
    """``window`` counts tokens including the model's special tokens."""

    name: str
    dimensions: int
    window: int
    tokenizer_name: str
    tokens: TokenCounter

    def embed_documents(self, texts: Sequence[str]) -> np.ndarray: ...

    def embed_query(self, text: str) -> np.ndarray: ...


def text_hash(text: str) -> str:
    return hashlib.sha256(text.encode("utf-8")).hexdigest()
