"""The web console: static files shipped inside the package, sent with a strict content policy.

The console is plain modules, a style sheet and an icon; the browser fetches nothing from
elsewhere, so it works on a server with no way out. It talks to the same ``/v1`` routes as any
client, with the key the user pastes, so it needs no route or permission of its own.
"""

from __future__ import annotations

from pathlib import Path

from fastapi import APIRouter, FastAPI
from fastapi.responses import RedirectResponse
from starlette.responses import Response
from starlette.staticfiles import StaticFiles
from starlette.types import Scope

CONSOLE_FILES = Path(__file__).resolve().parents[1] / "console"
CONSOLE_PATH = "/console"

# Scripts, styles, images and requests from this origin only; nothing inline, no frames, no
# plugins, and forms never submit anywhere (the console sends its requests itself).
CONTENT_SECURITY_POLICY = "; ".join(
    (
        "default-src 'self'",
        "script-src 'self'",
        "style-src 'self'",
        "img-src 'self'",
        "connect-src 'self'",
        "object-src 'none'",
        "base-uri 'none'",
        "form-action 'none'",
        "frame-ancestors 'none'",
    )
)
SECURITY_HEADERS = {
    "Content-Security-Policy": CONTENT_SECURITY_POLICY,
    "X-Content-Type-Options": "nosniff",
    "Referrer-Policy": "no-referrer",
    "Cache-Control": "no-cache",
}

router = APIRouter(include_in_schema=False)


@router.get(CONSOLE_PATH)
def console_entry() -> RedirectResponse:
    # The pages load their modules by relative path, so they must be read from the folder.
    return RedirectResponse(f"{CONSOLE_PATH}/", status_code=308)


class ConsoleFiles(StaticFiles):
    async def get_response(self, path: str, scope: Scope) -> Response:
        response = await super().get_response(path, scope)
        response.headers.update(SECURITY_HEADERS)
        return response


def mount_console(app: FastAPI) -> None:
    app.include_router(router)
    app.mount(CONSOLE_PATH, ConsoleFiles(directory=CONSOLE_FILES, html=True), name="console")
