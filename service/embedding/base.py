"""The small interface every embedder offers, and the hash the embedding cache keys on."""

from __future__ import annotations

import hashlib
from collections.abc import Sequence
from typing import Protocol

import numpy as np

from service.ingest.chunking import TokenCounter


class Embedder(Protocol):
    """``window`` counts tokens including the model's special tokens."""

    @property
    def name(self) -> str: ...

    @property
    def dimensions(self) -> int: ...

    @property
    def window(self) -> int: ...

    @property
    def special_tokens(self) -> int:
        """Tokens the model adds around every input ([CLS] and [SEP] for BERT-style models)."""
        ...

    @property
    def tokenizer_name(self) -> str: ...

    @property
    def tokens(self) -> TokenCounter: ...

    def embed_documents(self, texts: Sequence[str]) -> np.ndarray: ...

    def embed_query(self, text: str) -> np.ndarray: ...


def text_hash(text: str) -> str:
    return hashlib.sha256(text.encode("utf-8")).hexdigest()
