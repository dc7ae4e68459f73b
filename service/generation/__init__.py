"""Generators: the interface, the offline extractive default and the chat-http client."""

from service.generation.base import (
    INSUFFICIENT_EVIDENCE,
    GeneratedAnswer,
    Generator,
    SettledText,
    clean_markers,
    markers_in,
    settle_markers,
)

__all__ = [
    "INSUFFICIENT_EVIDENCE",
    "GeneratedAnswer",
    "Generator",
    "SettledText",
    "clean_markers",
    "markers_in",
    "settle_markers",
]
