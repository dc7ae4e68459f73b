"""The bundled model's WordPiece tokenizer, counting tokens the way chunking and packing need."""

from __future__ import annotations

from pathlib import Path

from tokenizers import Tokenizer


class ModelTokenCounter:
    """Token counts and offsets without special tokens, over the model's ``tokenizer.json``.

    The file ships with padding and truncation to 128 tokens switched on; both are switched off
    here, or every count would be padded up or cut down to that length.
    """

    def __init__(self, tokenizer: Tokenizer) -> None:
        tokenizer.no_padding()
        tokenizer.no_truncation()
        self._tokenizer = tokenizer

    @classmethod
    def from_model_dir(cls, model_dir: Path | str) -> ModelTokenCounter:
        return cls(Tokenizer.from_file(str(Path(model_dir) / "tokenizer.json")))

    def count(self, text: str) -> int:
        return len(self._tokenizer.encode(text, add_special_tokens=False).ids)

    def offsets(self, text: str) -> list[tuple[int, int]]:
        return list(self._tokenizer.encode(text, add_special_tokens=False).offsets)
