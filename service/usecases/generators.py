"""Choosing a generator per request or by setting; only configured generators are offered."""

from __future__ import annotations

import threading

from service.config import Settings
from service.embedding.base import Embedder
from service.errors import InvalidRequest
from service.generation.base import Generator
from service.generation.chat_http import ChatEndpoint, ChatHttpGenerator
from service.generation.extractive import ExtractiveGenerator
from service.generation.filter_proposal import ChatFilterProposer
from service.index.analyzer import Analyzer
from service.logging_setup import register_secret

GENERATOR_NAMES = ("extractive", "chat-http")


class GeneratorRegistry:
    """Builds each generator once, on first use, from the settings and the embedder."""

    def __init__(self, settings: Settings, embedder: Embedder) -> None:
        self._settings = settings
        self._embedder = embedder
        self._built: dict[str, Generator] = {}
        self._proposer: ChatFilterProposer | None = None
        self._lock = threading.Lock()

    def get(self, name: str | None) -> Generator:
        chosen = name or self._settings.generator
        if chosen not in GENERATOR_NAMES:
            raise InvalidRequest(
                f"Unknown generator {chosen!r}; choose extractive or chat-http.", field="generator"
            )
        with self._lock:
            if chosen not in self._built:
                self._built[chosen] = self._build(chosen)
            return self._built[chosen]

    def filter_proposer(self) -> ChatFilterProposer:
        """The chat endpoint as asked for filters (``infer_filter`` using chat-http)."""
        with self._lock:
            if self._proposer is None:
                self._proposer = ChatFilterProposer(
                    self._chat_endpoint("infer_filter.using", "Filter inference with chat-http")
                )
            return self._proposer

    def _chat_endpoint(self, field: str, what: str) -> ChatEndpoint:
        settings = self._settings
        if not settings.chat_url:
            raise InvalidRequest(f"{what} is not configured (set EXCERPTA_CHAT_URL).", field=field)
        api_key = settings.chat_api_key.get_secret_value() if settings.chat_api_key else None
        if api_key:
            register_secret(api_key)
        return ChatEndpoint(
            settings.chat_url,
            settings.chat_model,
            api_key,
            timeout_seconds=settings.chat_timeout_seconds,
            max_retries=settings.chat_max_retries,
        )

    def _build(self, name: str) -> Generator:
        settings = self._settings
        embedder = self._embedder
        if name == "extractive":
            return ExtractiveGenerator(
                embed_query=embedder.embed_query,
                embed_texts=embedder.embed_documents,
                analyzer_tokens=Analyzer.english().tokens,
                max_sentences=settings.extractive_max_sentences,
            )
        endpoint = self._chat_endpoint("generator", "The chat-http generator")
        return ChatHttpGenerator(endpoint, settings.chat_token_margin)
