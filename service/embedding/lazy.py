"""An embedder that loads its model the first time something embeds or counts tokens, so a
command that never does (keys, jobs, a lexical search) never pays for the model."""

from __future__ import annotations

import threading
from collections.abc import Callable, Sequence
from typing import Any

import numpy as np

from service.embedding.base import Embedder
from service.ingest.chunking import TokenCounter


class LazyEmbedder:
    """``described`` gives the facts known without the model (its class attributes);
    ``load`` makes the model."""

    def __init__(self, described: Any, load: Callable[[], Embedder]) -> None:
        self.name: str = described.name
        self.dimensions: int = described.dimensions
        self.window: int = described.window
        self.special_tokens: int = described.special_tokens
        self.tokenizer_name: str = described.tokenizer_name
        self._load = load
        self._model: Embedder | None = None
        self._lock = threading.Lock()

    @property
    def loaded(self) -> bool:
        return self._model is not None

    def _get(self) -> Embedder:
        with self._lock:
            if self._model is None:
                self._model = self._load()
            return self._model

    @property
    def tokens(self) -> TokenCounter:
        return self._get().tokens

    def embed_documents(self, texts: Sequence[str]) -> np.ndarray:
        return self._get().embed_documents(texts)

    def embed_query(self, text: str) -> np.ndarray:
        return self._get().embed_query(text)
