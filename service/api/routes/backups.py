"""A backup of the store, downloaded by an admin while the service runs."""

from __future__ import annotations

from fastapi import APIRouter
from fastapi.responses import FileResponse
from starlette.background import BackgroundTask

from service.api.deps import CallerDep, RuntimeDep
from service.api.errors import ERROR_RESPONSES
from service.usecases import backups as usecase

router = APIRouter(prefix="/v1/backup", tags=["operations"], responses=ERROR_RESPONSES)


@router.get(
    "",
    response_class=FileResponse,
    responses={
        200: {
            "description": "The backup file",
            "content": {
                media_type: {"schema": {"type": "string", "format": "binary"}}
                for media_type in usecase.BACKUP_MEDIA_TYPES
            },
        }
    },
)
def download_backup(runtime: RuntimeDep, caller: CallerDep) -> FileResponse:
    backup = usecase.make_backup(runtime, caller)
    return FileResponse(
        backup.path,
        media_type=backup.media_type,
        filename=backup.filename,
        headers={"X-Excerpta-Rows": str(backup.rows)},
        background=BackgroundTask(usecase.discard, backup),
    )
