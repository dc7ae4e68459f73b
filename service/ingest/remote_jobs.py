"""Documents sent to a running server as jobs, and the jobs followed, over its HTTP API.

``excerpta ingest --url`` uses this instead of the store: the server records each batch as a
job (``"wait": false``) and its worker embeds it, so the command needs no model and no access
to the store.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import httpx

from service.server_client import ServerClient, ServerRefused, refusal

FINISHED = ("done", "failed", "cancelled")


@dataclass(frozen=True)
class RefusedDocument:
    """A document of a batch the server refused, by its place in that batch."""

    index: int
    id: str | None
    message: str


class DocumentsRefused(Exception):
    """The server refused a batch whole because of these documents (nothing was recorded)."""

    def __init__(self, documents: Sequence[RefusedDocument]) -> None:
        super().__init__(f"{len(documents)} document(s) refused")
        self.documents = tuple(documents)


class BatchTooLarge(Exception):
    """The server refused a batch for one of its limits (size of the body, of the batch or of
    a text); the message is the server's."""


@dataclass(frozen=True)
class RemoteJob:
    """A job as the server reports it: its state, how far it got, and what it refused."""

    id: str
    state: str
    documents: int
    documents_done: int
    chunks: int
    statuses: tuple[str, ...]
    refused: tuple[RefusedDocument, ...]
    failure: str | None

    @property
    def finished(self) -> bool:
        return self.state in FINISHED


class RemoteJobs:
    def __init__(
        self, url: str, key: str | None, *, transport: httpx.BaseTransport | None = None
    ) -> None:
        self._server = ServerClient(url, key, transport=transport)

    def close(self) -> None:
        self._server.close()

    def put_collection(self, name: str, schema: Mapping[str, Any]) -> None:
        self._server.send("PUT", f"/v1/collections/{name}", json=dict(schema))

    def submit(self, collection: str, documents: Sequence[Mapping[str, Any]]) -> str:
        """Record a job writing ``documents``; its id. A batch with an invalid document is
        refused whole (``DocumentsRefused`` names each), as is one past a limit
        (``BatchTooLarge``)."""
        response = self._server.request(
            "POST",
            f"/v1/collections/{collection}/documents",
            json={"documents": list(documents), "wait": False},
        )
        if response.status_code in (413, 422):
            error = response.json().get("error", {})
            if error.get("code") == "invalid_documents":
                raise DocumentsRefused([_refused(problem) for problem in error["documents"]])
            if error.get("code") in ("payload_too_large", "limit_exceeded"):
                raise BatchTooLarge(str(error.get("message")))
        if response.status_code != 202:
            raise ServerRefused(refusal(response))
        return str(response.json()["job_id"])

    def job(self, job_id: str) -> RemoteJob:
        body = self._server.send("GET", f"/v1/jobs/{job_id}")
        counts = body["counts"]
        failure = body.get("error")
        return RemoteJob(
            id=str(body["job_id"]),
            state=str(body["state"]),
            documents=int(counts["documents"]),
            documents_done=int(counts["documents_done"]),
            chunks=int(counts["chunks"]),
            statuses=tuple(str(result["status"]) for result in body["results"]),
            refused=tuple(_refused(problem) for problem in body["errors"]),
            failure=None if failure is None else str(failure.get("message")),
        )

    def cancel(self, job_id: str) -> None:
        """Ask the server to stop the job at its next batch; one that finished meanwhile is
        left as it is."""
        response = self._server.request("DELETE", f"/v1/jobs/{job_id}")
        if response.is_error and response.status_code != 409:
            raise ServerRefused(refusal(response))


def _refused(problem: Mapping[str, Any]) -> RefusedDocument:
    return RefusedDocument(
        index=int(problem["index"]),
        id=None if problem.get("id") is None else str(problem["id"]),
        message=str(problem.get("message") or problem.get("reason")),
    )
