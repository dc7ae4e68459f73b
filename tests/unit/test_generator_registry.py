"""Choosing and building generators from settings alone: no runtime, no store, no model."""

from __future__ import annotations

import pytest

from service.config import Settings
from service.errors import InvalidRequest
from service.generation.chat_http import ChatHttpGenerator
from service.generation.extractive import ExtractiveGenerator
from service.logging_setup import redact
from service.usecases.generators import GeneratorRegistry
from tests.hashing_embedder import HashingTestEmbedder


def registry(**settings: object) -> GeneratorRegistry:
    return GeneratorRegistry(Settings(**settings), HashingTestEmbedder())


def test_the_default_generator_comes_from_the_settings_and_is_built_once() -> None:
    generators = registry(extractive_max_sentences=2)
    chosen = generators.get(None)
    assert isinstance(chosen, ExtractiveGenerator)
    assert chosen.max_sentences == 2
    assert generators.get("extractive") is chosen


def test_an_unknown_generator_is_refused_with_the_choices() -> None:
    with pytest.raises(InvalidRequest) as refused:
        registry().get("oracle")
    assert refused.value.message == "Unknown generator 'oracle'; choose extractive or chat-http."
    assert refused.value.extra == {"field": "generator"}


def test_chat_http_without_an_address_is_refused_with_the_setting_to_set() -> None:
    with pytest.raises(InvalidRequest) as refused:
        registry().get("chat-http")
    assert refused.value.message == (
        "The chat-http generator is not configured (set EXCERPTA_CHAT_URL)."
    )


def test_chat_http_is_built_from_its_settings_and_its_key_is_kept_out_of_logs() -> None:
    generators = registry(
        generator="chat-http",
        chat_url="http://127.0.0.1:9/v1/chat",
        chat_model="velo-writer",
        chat_api_key="sk-registry-test-9f2c",
        chat_timeout_seconds=3.5,
        chat_max_retries=1,
    )
    chosen = generators.get(None)
    assert isinstance(chosen, ChatHttpGenerator)
    endpoint = chosen.endpoint
    assert (endpoint.url, endpoint.model) == ("http://127.0.0.1:9/v1/chat", "velo-writer")
    assert (endpoint.timeout_seconds, endpoint.max_retries) == (3.5, 1)
    assert redact("sent sk-registry-test-9f2c") == "sent [redacted]"


def test_filter_inference_with_chat_http_needs_the_endpoint_and_shares_its_settings() -> None:
    with pytest.raises(InvalidRequest) as refused:
        registry().filter_proposer()
    assert refused.value.extra == {"field": "infer_filter.using"}
    generators = registry(chat_url="http://127.0.0.1:9/v1/chat", chat_model="velo-writer")
    proposer = generators.filter_proposer()
    assert proposer.endpoint.url == "http://127.0.0.1:9/v1/chat"
    assert proposer.endpoint.model == "velo-writer"
    assert generators.filter_proposer() is proposer
