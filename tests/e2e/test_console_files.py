"""The console's files: served from the package under a strict content policy, nothing inline,
nothing fetched from another origin."""

from __future__ import annotations

import re
from html.parser import HTMLParser
from pathlib import Path

import pytest

from service.api.routes.console import CONSOLE_FILES
from tests.api_helpers import Api

SCRIPTS = sorted(CONSOLE_FILES.glob("*.js"))
IMPORT = re.compile(r"""^import .* from "(?P<target>[^"]+)";$""", re.MULTILINE)


class PageParts(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.scripts: list[dict[str, str | None]] = []
        self.inline_script = False
        self.references: list[str] = []
        self.style_elements = 0
        self.style_attributes = 0
        self.handler_attributes: list[str] = []
        self._in_script = False

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        attributes = dict(attrs)
        if tag == "script":
            self.scripts.append(attributes)
            self._in_script = True
        if tag == "style":
            self.style_elements += 1
        if "style" in attributes:
            self.style_attributes += 1
        self.handler_attributes += [name for name in attributes if name.startswith("on")]
        for name in ("src", "href"):
            value = attributes.get(name)
            if value and not value.startswith("#"):
                self.references.append(value)

    def handle_endtag(self, tag: str) -> None:
        if tag == "script":
            self._in_script = False

    def handle_data(self, data: str) -> None:
        if self._in_script and data.strip():
            self.inline_script = True


def test_the_console_address_leads_to_its_folder(api: Api) -> None:
    response = api.client.get("/console", follow_redirects=False)
    assert response.status_code == 308
    assert response.headers["location"] == "/console/"


def test_the_console_page_is_served_with_a_strict_content_policy(api: Api) -> None:
    response = api.client.get("/console/")
    assert response.status_code == 200
    assert response.headers["content-type"].startswith("text/html")
    policy = {
        directive.split(" ", 1)[0]: directive.split(" ", 1)[1]
        for directive in response.headers["content-security-policy"].split("; ")
    }
    assert policy["default-src"] == "'self'"
    assert policy["script-src"] == "'self'"
    assert policy["style-src"] == "'self'"
    assert policy["frame-ancestors"] == "'none'"
    assert "unsafe" not in response.headers["content-security-policy"]
    assert response.headers["x-content-type-options"] == "nosniff"


def test_the_console_page_has_nothing_inline_and_only_local_references(api: Api) -> None:
    page = PageParts()
    page.feed(api.client.get("/console/").text)
    assert page.scripts and all(script.get("src") for script in page.scripts)
    assert not page.inline_script
    assert page.style_elements == 0 and page.style_attributes == 0
    assert page.handler_attributes == []
    for reference in page.references:
        assert "//" not in reference and ":" not in reference, reference
        assert (CONSOLE_FILES / reference).is_file(), reference
        assert api.client.get(f"/console/{reference}").status_code == 200


@pytest.mark.parametrize("script", SCRIPTS, ids=lambda path: path.name)
def test_each_console_module_imports_only_modules_beside_it(script: Path) -> None:
    text = script.read_text(encoding="utf-8")
    for target in IMPORT.findall(text):
        assert target.startswith("./"), target
        assert (CONSOLE_FILES / target).is_file(), target
    # The SVG namespace is a name, never fetched.
    local = text.replace('"http://www.w3.org/2000/svg"', "")
    assert "http://" not in local and "https://" not in local
    # No markup built from strings: text from the server must never be parsed as HTML.
    assert "innerHTML" not in text and "insertAdjacentHTML" not in text
    assert "eval(" not in text and "new Function" not in text


def test_every_console_file_carries_the_policy_and_a_missing_one_is_404(api: Api) -> None:
    for path in sorted(CONSOLE_FILES.iterdir()):
        response = api.client.get(f"/console/{path.name}")
        assert response.status_code == 200, path.name
        assert response.headers["content-security-policy"].startswith("default-src 'self'")
    assert api.client.get("/console/missing.js").status_code == 404


@pytest.mark.parametrize("path", ["/docs", "/redoc", "/docs/oauth2-redirect"])
def test_no_interactive_docs_page_loads_scripts_from_elsewhere(api: Api, path: str) -> None:
    assert api.client.get(path).status_code == 404
