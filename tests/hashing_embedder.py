"""A deterministic embedder for tests: hashed word features, no model, no meaning.

It exists so tests run in milliseconds. It lives with the tests, outside the installed package,
so no setting can select it and a server can never fall back to it by accident.
"""

from __future__ import annotations

import hashlib
import re
from collections.abc import Sequence

import numpy as np

_WORD = re.compile(r"\w+", re.UNICODE)


class WhitespaceTokenCounter:
    """Counts word and punctuation tokens; a stand-in for a real tokenizer in tests."""

    _TOKEN = re.compile(r"\w+|[^\w\s]", re.UNICODE)

    def count(self, text: str) -> int:
        return sum(1 for _ in self._TOKEN.finditer(text))

    def offsets(self, text: str) -> list[tuple[int, int]]:
        return [m.span() for m in self._TOKEN.finditer(text)]


class HashingTestEmbedder:
    name = "hashing-test-only"
    window = 512
    special_tokens = 0
    tokenizer_name = "words-and-punctuation (test only)"

    def __init__(self, dimensions: int = 64) -> None:
        self.dimensions = dimensions
        self.tokens = WhitespaceTokenCounter()
        self.calls = 0
        self.embedded_texts = 0

    def embed_documents(self, texts: Sequence[str]) -> np.ndarray:
        self.calls += 1
        self.embedded_texts += len(texts)
        out = np.zeros((len(texts), self.dimensions), dtype=np.float32)
        for row, text in enumerate(texts):
            for word in _WORD.findall(text.lower()):
                digest = hashlib.blake2b(word.encode("utf-8"), digest_size=8).digest()
                bucket = int.from_bytes(digest[:4], "little") % self.dimensions
                sign = 1.0 if digest[4] & 1 else -1.0
                out[row, bucket] += sign
            norm = float(np.linalg.norm(out[row]))
            out[row] = out[row] / norm if norm > 0 else out[row]
            if norm == 0:
                out[row, 0] = 1.0
        return out

    def embed_query(self, text: str) -> np.ndarray:
        return self.embed_documents([text])[0]
