"""Which rows a caller may see: the access half of the candidate mask."""

from __future__ import annotations

import numpy as np

from service.index.collection_index import IndexSnapshot


def access_mask(snapshot: IndexSnapshot, groups: frozenset[str] | None) -> np.ndarray:
    """Live rows visible to a caller with ``groups``; ``None`` is an admin, who sees all.

    A row without groups is visible to everyone; otherwise the caller must share one group.
    """
    if groups is None:
        return snapshot.live.copy()
    return snapshot.access.visible(groups) & snapshot.live
