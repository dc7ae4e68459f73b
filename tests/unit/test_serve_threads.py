"""``excerpta serve`` gives the question-embedding model the threads its setting names."""

from __future__ import annotations

import argparse
from collections.abc import Iterator
from types import SimpleNamespace

import pytest
import torch

from service import cli
from service.config import Settings


@pytest.fixture
def torch_threads_restored() -> Iterator[None]:
    before = torch.get_num_threads()
    yield
    torch.set_num_threads(before)


def _serve_with(monkeypatch: pytest.MonkeyPatch, settings: Settings) -> list[object]:
    """``cmd_serve`` with the store, the model and the job queue stood in for."""
    served: list[object] = []
    monkeypatch.setattr(cli, "_settings", lambda args: settings)
    monkeypatch.setattr("service.usecases.workers.serving_queue", lambda *args: None)
    monkeypatch.setattr(
        "service.usecases.runtime.open_runtime",
        lambda settings, make_embedder, **parts: SimpleNamespace(settings=settings),
    )
    monkeypatch.setattr("service.api.server.serve", served.append)
    monkeypatch.setattr("service.logging_setup.configure_logging", lambda **kwargs: None)
    assert cli.cmd_serve(argparse.Namespace()) == 0
    return served


def test_serve_caps_the_model_threads_before_serving(
    monkeypatch: pytest.MonkeyPatch, torch_threads_restored: None
) -> None:
    torch.set_num_threads(2)
    served = _serve_with(monkeypatch, Settings(blas_threads=0, serve_model_threads=1))
    assert len(served) == 1
    assert torch.get_num_threads() == 1


def test_zero_keeps_the_libraries_own_thread_count(
    monkeypatch: pytest.MonkeyPatch, torch_threads_restored: None
) -> None:
    torch.set_num_threads(2)
    _serve_with(monkeypatch, Settings(blas_threads=0, serve_model_threads=0))
    assert torch.get_num_threads() == 2
