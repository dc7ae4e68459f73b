"""The one settings class: environment variables prefixed ``EXCERPTA_`` and matching CLI flags."""

from __future__ import annotations

from pathlib import Path
from typing import Literal

from pydantic import Field, SecretStr
from pydantic_settings import BaseSettings, SettingsConfigDict


class Settings(BaseSettings):
    model_config = SettingsConfigDict(env_prefix="EXCERPTA_", extra="ignore")

    data_dir: Path = Path("./data")
    database_url: str | None = None
    host: str = "127.0.0.1"
    port: int = 8000
    embedder: Literal["minilm"] = "minilm"
    auth: Literal["required", "disabled"] = "required"

    index_poll_ms: int = Field(500, ge=0)
    # One BLAS thread per query: on a small CPU server concurrent queries already use every
    # core, and a matrix-vector product split over threads pays more in hand-offs than it gains.
    blas_threads: int = Field(1, ge=0, description="0 keeps the BLAS library's own default")
    # The serving process embeds one short question per request; spread over every core, the
    # model's threads wait on each other whenever another query holds a core.
    serve_model_threads: int = Field(1, ge=0, description="0 keeps torch's own default")
    compact_after_deleted_rows: int = Field(1024, ge=1)
    # Where each collection's index is saved, to be read back at the next start instead of
    # being built from the store; each replica keeps its own. Default: <data dir>/indexes.
    index_dir: Path | None = None
    # An index that only took writes since its last save is saved again this often.
    index_save_seconds: float = Field(300.0, gt=0)

    # A write that loses a race against another writer is tried this many times in all, after
    # random pauses of up to write_retry_pause_seconds, doubling; then it is answered ``busy``.
    write_attempts: int = Field(5, ge=1, le=20)
    write_retry_pause_seconds: float = Field(0.05, ge=0.0, le=5.0)
    # On SIGTERM the server stops accepting and gives requests in flight this long to finish.
    shutdown_grace_seconds: int = Field(30, ge=0)

    # Document writes are jobs, run by worker processes: one the server starts (the default),
    # or ``excerpta worker`` processes fed through a Celery broker when broker_url is set.
    broker_url: str | None = None
    # The broker queue the jobs go through: deployments sharing one broker each name their own.
    broker_queue: str = Field("excerpta-jobs", min_length=1, max_length=200)
    # How long the broker waits for a task's acknowledgement before handing it to another
    # worker (Redis); longer than any one job should run.
    broker_visibility_seconds: int = Field(3600, ge=1)
    job_batch_documents: int = Field(16, ge=1, le=1000)
    # A running job's worker renews its claim at every batch; a claim that ran out lets another
    # worker take the job over where the store says it stopped.
    job_lease_seconds: float = Field(300.0, gt=0)
    job_poll_ms: int = Field(500, ge=10, description="how often an idle worker looks for jobs")
    # The worker's share of the CPU: 0 leaves the query path one core (all cores but one).
    worker_torch_threads: int = Field(0, ge=0)
    # The server's own worker also yields the CPU to queries whenever both want it (a process
    # niceness added to the server's; 0 leaves it equal). ``excerpta worker`` keeps its own.
    worker_nice: int = Field(10, ge=0, le=19)
    query_cache_entries: int = Field(4096, ge=0, description="query vectors kept in memory")

    max_body_bytes: int = 10 * 1024 * 1024
    max_batch_documents: int = 1000
    max_document_text_bytes: int = 2 * 1024 * 1024
    max_query_chars: int = 2000
    max_top_k: int = 1000
    max_depth: int = 1000
    max_token_budget: int = 32_768

    rate_limit_per_second: float = Field(0.0, ge=0.0, description="0 turns the limit off")
    rate_limit_burst: int = Field(20, ge=1)

    trace_retention_days: int = Field(14, ge=1)
    trace_retention_count: int = Field(100_000, ge=1)

    cors_origins: list[str] = []

    # "json" writes each log record as one JSON object per line.
    log_format: Literal["text", "json"] = "text"
    # When set, GET /metrics wants it as a bearer key; unset, the route needs no key.
    metrics_key: SecretStr | None = None

    generator: Literal["extractive", "chat-http"] = "extractive"
    extractive_max_sentences: int = Field(4, ge=1, le=20)
    chat_url: str | None = None
    chat_model: str = ""
    chat_api_key: SecretStr | None = None
    chat_token_margin: float = Field(1.25, ge=1.0, le=4.0)
    chat_timeout_seconds: float = Field(30.0, gt=0)
    chat_max_retries: int = Field(2, ge=0, le=10)

    def resolved_index_dir(self) -> Path:
        return self.index_dir if self.index_dir is not None else self.data_dir / "indexes"

    def resolved_database_url(self) -> str:
        if self.database_url:
            return self.database_url
        return f"sqlite:///{(self.data_dir / 'excerpta.db').as_posix()}"
