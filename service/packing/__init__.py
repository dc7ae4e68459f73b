"""Token-budget packing of ranked chunks into numbered passages."""

from service.packing.packer import (
    PackCandidate,
    PackedContext,
    PackOutcome,
    Passage,
    pack_context,
)

__all__ = ["PackCandidate", "PackOutcome", "PackedContext", "Passage", "pack_context"]
