"""Query vectors kept by (embedder, text), so a question asked again costs no model call.

Bounded: the least recently used vector goes first. The vectors are returned read-only, since
every caller of a cached question shares one array.
"""

from __future__ import annotations

import threading
from collections import OrderedDict
from collections.abc import Sequence

import numpy as np

from service.embedding.base import Embedder
from service.ingest.chunking import TokenCounter


class CachedQueryEmbedder:
    """``inner`` with its query vectors cached (at most ``entries``; 0 caches nothing)."""

    def __init__(self, inner: Embedder, entries: int) -> None:
        self.inner = inner
        self._entries = entries
        self._vectors: OrderedDict[tuple[str, str], np.ndarray] = OrderedDict()
        self._lock = threading.Lock()

    @property
    def name(self) -> str:
        return self.inner.name

    @property
    def dimensions(self) -> int:
        return self.inner.dimensions

    @property
    def window(self) -> int:
        return self.inner.window

    @property
    def special_tokens(self) -> int:
        return self.inner.special_tokens

    @property
    def tokenizer_name(self) -> str:
        return self.inner.tokenizer_name

    @property
    def tokens(self) -> TokenCounter:
        return self.inner.tokens

    def embed_documents(self, texts: Sequence[str]) -> np.ndarray:
        return self.inner.embed_documents(texts)

    def embed_query(self, text: str) -> np.ndarray:
        key = (self.inner.name, text)
        with self._lock:
            found = self._vectors.get(key)
            if found is not None:
                self._vectors.move_to_end(key)
                return found
        vector = np.array(self.inner.embed_query(text), dtype=np.float32)
        vector.setflags(write=False)
        if self._entries > 0:
            with self._lock:
                self._vectors[key] = vector
                self._vectors.move_to_end(key)
                while len(self._vectors) > self._entries:
                    self._vectors.popitem(last=False)
        return vector

    def __len__(self) -> int:
        return len(self._vectors)
