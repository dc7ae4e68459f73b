"""``excerpta demo``: the demo collection and its admin key are made once; a second run
re-uses both."""

from __future__ import annotations

import stat
from collections.abc import Callable

from service.usecases import keys
from service.usecases.callers import Role
from service.usecases.demo import set_up_demo
from service.usecases.job_queues import StoreQueue
from service.usecases.runtime import Runtime
from tests.conftest import REPO
from tests.progress_lines import ReportedLines

CORPUS = REPO / "corpus_example"


def test_the_demo_is_made_once_with_an_admin_key_only_its_owner_reads(
    make_runtime: Callable[..., Runtime],
) -> None:
    runtime = make_runtime(jobs=StoreQueue())
    lines: list[str] = []
    documents = sum(1 for path in (CORPUS / "documents").iterdir() if path.is_file())

    first = set_up_demo(runtime, "bikes", CORPUS, ReportedLines(lines.append))

    assert first.ingested == (documents, 0) and lines == []
    assert first.secret is not None
    assert first.key_file.read_text(encoding="utf-8") == first.secret + "\n"
    assert stat.S_IMODE(first.key_file.stat().st_mode) == 0o600
    assert keys.authenticate(runtime.key_reader, first.secret).role is Role.ADMIN

    again = set_up_demo(runtime, "bikes", CORPUS, ReportedLines(lines.append))
    assert (again.ingested, again.secret, again.key_file) == (None, None, first.key_file)
    with runtime.transaction() as session:
        assert len(keys.list_keys(session)) == 1
