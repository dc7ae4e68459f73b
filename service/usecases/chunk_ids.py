"""The contract's chunk id: ``<document id>#<ordinal, four digits or more>``."""


def chunk_id(document_id: str, ordinal: int) -> str:
    return f"{document_id}#{ordinal:04d}"
