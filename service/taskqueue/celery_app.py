"""Jobs as Celery tasks: the message a server sends for each job, and the worker that runs them.

A task carries only a job's id; the job itself is in the store. Tasks are acknowledged once they
have run (``acks_late``), and a worker lost mid-task gives its task back to the broker
(``reject_on_worker_lost``), so another worker runs it; running a job twice stores nothing twice
(``usecases.jobs``). This module knows nothing of jobs beyond their ids: the worker is handed the
function that runs one.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

from celery import Celery

TASK = "excerpta.run_job"


def celery_app(broker_url: str, *, queue: str, visibility_seconds: int) -> Celery:
    app = Celery("excerpta", broker=broker_url)
    app.conf.update(
        task_acks_late=True,
        task_reject_on_worker_lost=True,
        task_ignore_result=True,
        task_serializer="json",
        accept_content=["json"],
        task_default_queue=queue,
        # One job at a time per worker, and none held back from the other workers meanwhile.
        worker_prefetch_multiplier=1,
        worker_hijack_root_logger=False,
        broker_connection_retry_on_startup=True,
        broker_transport_options={"visibility_timeout": visibility_seconds},
    )
    return app


def sender(app: Celery) -> Callable[[str], None]:
    """Send one job's task; what a server's queue calls for each job it records."""

    def send(job_id: str) -> None:
        app.send_task(TASK, args=[job_id])

    return send


def run_worker(app: Celery, run: Callable[[str], float | None], *, hostname: str) -> None:
    """Run tasks until stopped; ``run(job_id)`` answers the seconds to wait when another live
    worker holds the job, and the task is then tried again after that long."""

    @app.task(name=TASK, bind=True, acks_late=True, max_retries=None)
    def run_job(task: Any, job_id: str) -> None:
        held_for = run(job_id)
        if held_for is not None:
            raise task.retry(countdown=max(1.0, held_for))

    app.worker_main(
        argv=[
            "worker",
            "--pool=solo",
            "--concurrency=1",
            f"--hostname={hostname}",
            f"--queues={app.conf.task_default_queue}",
            "--loglevel=INFO",
            "--without-gossip",
            "--without-mingle",
        ]
    )
