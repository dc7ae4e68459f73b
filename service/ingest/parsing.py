"""Turn a document's source (plain text, Markdown, HTML) into the normalised text users read.

The normalised text is the one string that chunk offsets point into, so every rule here decides
what a chunk can contain: headings stay as their own line (they carry meaning for retrieval and
for the reader), blocks are separated by exactly one blank line, list items and table rows sit on
their own lines, and whitespace inside a block is collapsed. Markdown is rendered by
markdown-it-py and then read by the same HTML walker as HTML documents, so both formats follow one
set of block rules. A page's navigation, banner and footer are not the document's content and are
dropped, so they never become a chunk or a section of their own.

Plain text keeps its lines as written; its headings are the ones a reader sees: a line underlined
with ``=`` or ``-``, or a short upper-case line that starts a paragraph. Heading levels follow the
order in which the document first uses each style (the common practice of reStructuredText).
"""

from __future__ import annotations

import re
import unicodedata
from collections.abc import Iterator
from dataclasses import dataclass

from bs4 import BeautifulSoup
from bs4.element import NavigableString, PreformattedString, Tag
from markdown_it import MarkdownIt

MEDIA_TYPES = ("text/plain", "text/markdown", "text/html")

# Metadata and code, not content a reader sees: dropped with everything inside them.
_DROPPED_ELEMENTS = frozenset({"script", "style", "head", "title", "noscript", "template"})
_HEADING_LEVELS = {f"h{level}": level for level in range(1, 7)}
# Elements whose children are lines of one group (list items, table rows) rather than paragraphs.
_LINE_GROUPS = frozenset({"ul", "ol", "menu", "dl", "table"})
_LINE_ITEMS = frozenset({"li", "dt", "dd", "tr"})
_TABLE_CELLS = frozenset({"td", "th"})
_BLOCKS = frozenset(
    {
        "address",
        "article",
        "aside",
        "blockquote",
        "body",
        "caption",
        "center",
        "details",
        "dialog",
        "div",
        "fieldset",
        "figcaption",
        "figure",
        "footer",
        "form",
        "header",
        "hgroup",
        "hr",
        "html",
        "legend",
        "main",
        "p",
        "section",
        "summary",
        "tbody",
        "tfoot",
        "thead",
    }
)
# A page's chrome rather than its content: navigation, and the banner and footer of the page as a
# whole. Per HTML-AAM, ``header`` and ``footer`` are the page's banner and footer (ARIA roles
# ``banner`` and ``contentinfo``) only when no sectioning element or ``main`` holds them; inside
# an article they are that article's own heading block and byline, which are kept.
_CHROME_ROLES = frozenset({"navigation", "banner", "contentinfo"})
_PAGE_ROLES = {"header": "banner", "footer": "contentinfo"}
_SECTIONING = frozenset({"article", "aside", "main", "nav", "section"})


@dataclass(frozen=True, slots=True)
class Section:
    """The heading path that covers ``[start, end)`` of the normalised text.

    A section with a non-empty path starts at its heading's line; text before the first heading
    has the empty path.
    """

    start: int
    end: int
    path: tuple[str, ...]


@dataclass(frozen=True, slots=True)
class ParsedText:
    """Normalised text and its sections, which tile the text from 0 to ``len(text)``."""

    text: str
    sections: tuple[Section, ...]


def parse_document(text: str, media_type: str) -> ParsedText:
    """Parse ``text`` of one of ``MEDIA_TYPES``; an unknown type is a caller's bug."""
    if media_type == "text/plain":
        return _parse_plain(text)
    if media_type == "text/markdown":
        return _parse_html(_MARKDOWN.render(text))
    if media_type == "text/html":
        return _parse_html(text)
    raise ValueError(f"unsupported media type {media_type!r}; expected one of {MEDIA_TYPES}")


# CommonMark plus the table and strikethrough extensions that most Markdown authors expect. The
# parser silently drops content nested deeper than ``maxNesting`` (20 by default, which nineteen
# nested lists already reach); 100 keeps real documents whole and stays clear of the recursion
# limit on hostile input.
_MARKDOWN = MarkdownIt("commonmark", {"maxNesting": 100}).enable(["table", "strikethrough"])


def _parse_plain(text: str) -> ParsedText:
    lines = [line.rstrip() for line in unicodedata.normalize("NFC", text).splitlines()]
    styles = _plain_heading_styles(lines)
    kept: list[tuple[str, str | None]] = []
    for index, line in enumerate(lines):
        if styles.get(index) == _UNDERLINE_LINE:
            continue
        if line or (kept and kept[-1][0]):
            kept.append((line, styles.get(index)))
    while kept and not kept[-1][0]:
        kept.pop()
    normalised = "\n".join(line for line, _ in kept)
    order: list[str] = []
    path: list[tuple[int, str]] = []
    starts: list[tuple[int, tuple[str, ...]]] = []
    offset = 0
    for line, style in kept:
        if style is not None:
            if style not in order:
                order.append(style)
            level = order.index(style) + 1
            while path and path[-1][0] >= level:
                path.pop()
            path.append((level, _collapse(line)))
            starts.append((offset, tuple(heading for _, heading in path)))
        offset += len(line) + 1
    return ParsedText(normalised, _tile(normalised, starts))


# The style a plain-text line's heading has, or that the line is the underline of the one above.
_UNDERLINE_LINE = "underline"
_UPPER_CASE = "upper-case"
_UNDERLINE = re.compile(r"={3,}|-{3,}")
_LIST_ITEM = re.compile(r"\s*(?:[-*+•]|\d+[.)])\s")
_PLAIN_HEADING_MAX_WORDS = 12


def _plain_heading_styles(lines: list[str]) -> dict[int, str]:
    """Line index to heading style (``=``, ``-`` or upper case), or to ``_UNDERLINE_LINE``.

    A heading starts a paragraph (it follows a blank line or the start), is at most a dozen
    words and is no list item; an upper-case one is mostly letters, none of them lower case, and
    does not end like a sentence or hold a table's ``|``.
    """
    styles: dict[int, str] = {}
    for index, line in enumerate(lines):
        if not line or (index > 0 and lines[index - 1]) or index in styles:
            continue
        words = line.split()
        if len(words) > _PLAIN_HEADING_MAX_WORDS or _LIST_ITEM.match(line):
            continue
        following = lines[index + 1].strip() if index + 1 < len(lines) else ""
        if _UNDERLINE.fullmatch(following):
            styles[index] = following[0]
            styles[index + 1] = _UNDERLINE_LINE
            continue
        letters = sum(character.isalpha() for character in line)
        if (
            letters >= 3
            and 2 * letters >= sum(len(word) for word in words)
            and not any(character.islower() for character in line)
            and "|" not in line
            and line[-1] not in ".!?,;"
        ):
            styles[index] = _UPPER_CASE
    return styles


def _tile(text: str, starts: list[tuple[int, tuple[str, ...]]]) -> tuple[Section, ...]:
    """Sections from where each heading's section starts, text before the first one unnamed."""
    if not text:
        return ()
    if not starts or starts[0][0] != 0:
        starts = [(0, ()), *starts]
    ends = [start for start, _ in starts[1:]] + [len(text)]
    return tuple(Section(start, end, path) for (start, path), end in zip(starts, ends, strict=True))


def _collapse(text: str) -> str:
    return " ".join(unicodedata.normalize("NFC", text).split())


class _TextBuilder:
    """Appends blocks with the right separators and records where each heading's section starts."""

    def __init__(self) -> None:
        self._parts: list[str] = []
        self._length = 0
        self._group_depth = 0
        self._line_follows = False
        self._headings: list[tuple[int, str]] = []
        self._section_starts: list[tuple[int, tuple[str, ...]]] = []

    def begin_group(self) -> None:
        if self._group_depth == 0:
            self._line_follows = False
        self._group_depth += 1

    def end_group(self) -> None:
        self._group_depth -= 1
        if self._group_depth == 0:
            self._line_follows = False

    def block(self, text: str) -> None:
        if self._parts:
            self._append("\n" if self._line_follows else "\n\n")
        self._append(text)
        self._line_follows = self._group_depth > 0

    def heading(self, level: int, text: str) -> None:
        while self._headings and self._headings[-1][0] >= level:
            self._headings.pop()
        self._headings.append((level, text))
        self._line_follows = False
        if self._parts:
            self._append("\n\n")
        self._section_starts.append((self._length, tuple(t for _, t in self._headings)))
        self._append(text)

    def result(self) -> ParsedText:
        text = "".join(self._parts)
        return ParsedText(text, _tile(text, self._section_starts))

    def _append(self, piece: str) -> None:
        self._parts.append(piece)
        self._length += len(piece)


def _visible_strings(element: Tag) -> Iterator[str]:
    for node in element.descendants:
        if (
            isinstance(node, NavigableString)
            and not isinstance(node, PreformattedString)
            and not any(parent.name in _DROPPED_ELEMENTS for parent in node.parents)
        ):
            yield str(node)


class _HtmlWalker:
    """Reads an element tree in document order, gathering inline text until a block ends it."""

    def __init__(self) -> None:
        self.builder = _TextBuilder()
        self._inline: list[str] = []
        self._marker = ""
        self._list_counters: list[int | None] = []
        self._cells_in_row: list[int] = []

    def walk(self, root: BeautifulSoup) -> ParsedText:
        # An explicit stack instead of recursion: machine-made HTML can nest deeper than Python's
        # recursion limit.
        stack: list[tuple[object, bool]] = [(child, True) for child in reversed(root.contents)]
        while stack:
            node, entering = stack.pop()
            if isinstance(node, Tag):
                if entering:
                    if self._enter(node):
                        stack.append((node, False))
                        stack.extend((child, True) for child in reversed(node.contents))
                else:
                    self._leave(node)
            elif isinstance(node, NavigableString) and not isinstance(node, PreformattedString):
                self._inline.append(str(node))
        self._flush()
        return self.builder.result()

    def _enter(self, tag: Tag) -> bool:
        """Handle an opening tag; False when its content is consumed here or dropped."""
        name = tag.name
        if name in _DROPPED_ELEMENTS:
            return False
        chrome = _page_chrome(tag)
        if chrome is not None:
            if chrome == "banner":
                # The page's banner often holds the document's top heading; keep that alone.
                for heading in tag.find_all(list(_HEADING_LEVELS)):
                    if all(_page_chrome(p) is None for p in _ancestors_within(heading, tag)):
                        self._heading(heading)
            return False
        if name in _HEADING_LEVELS:
            self._heading(tag)
            return False
        if name == "pre":
            self._flush()
            self._preformatted(tag)
            return False
        if name == "br":
            self._inline.append(" ")
        elif name in _TABLE_CELLS:
            if self._cells_in_row and self._cells_in_row[-1] > 0:
                self._inline.append(" | ")
            if self._cells_in_row:
                self._cells_in_row[-1] += 1
        elif name in _LINE_GROUPS or name in _LINE_ITEMS or name in _BLOCKS:
            self._flush()
            if name in _LINE_GROUPS:
                self.builder.begin_group()
                self._list_counters.append(_list_start(tag) if name == "ol" else None)
            elif name == "li":
                self._marker = self._next_marker()
            elif name == "tr":
                self._cells_in_row.append(0)
        return True

    def _heading(self, tag: Tag) -> None:
        self._flush()
        heading = _collapse("".join(_visible_strings(tag)))
        if heading:
            self.builder.heading(_HEADING_LEVELS[tag.name], heading)

    def _leave(self, tag: Tag) -> None:
        name = tag.name
        if name in _LINE_GROUPS or name in _LINE_ITEMS or name in _BLOCKS:
            self._flush()
            if name in _LINE_GROUPS:
                self.builder.end_group()
                self._list_counters.pop()
            elif name == "tr":
                self._cells_in_row.pop()

    def _next_marker(self) -> str:
        if not self._list_counters or self._list_counters[-1] is None:
            return "- "
        number = self._list_counters[-1]
        self._list_counters[-1] = number + 1
        return f"{number}. "

    def _flush(self) -> None:
        text = _collapse("".join(self._inline))
        self._inline.clear()
        if text:
            self.builder.block(self._marker + text)
            self._marker = ""

    def _preformatted(self, tag: Tag) -> None:
        """Keep code lines as written; blank lines inside would read as paragraph breaks."""
        raw = unicodedata.normalize("NFC", "".join(_visible_strings(tag)))
        lines = [line.rstrip() for line in raw.splitlines() if line.strip()]
        if not lines:
            return
        self.builder.begin_group()
        for line in lines:
            self.builder.block(line)
        self.builder.end_group()


def _page_chrome(tag: Tag) -> str | None:
    """The landmark role of a page's navigation, banner or footer; None for content."""
    role = tag.get("role")
    if isinstance(role, str):
        for token in role.lower().split():
            if token in _CHROME_ROLES:
                return token
    if tag.name == "nav":
        return "navigation"
    if tag.name in _PAGE_ROLES and not any(p.name in _SECTIONING for p in tag.parents):
        return _PAGE_ROLES[tag.name]
    return None


def _ancestors_within(tag: Tag, outer: Tag) -> Iterator[Tag]:
    """``tag``'s ancestors below ``outer``, nearest first."""
    for parent in tag.parents:
        if parent is outer:
            return
        yield parent


_INTEGER = re.compile(r"[+-]?\d+")


def _list_start(tag: Tag) -> int:
    start = tag.get("start")
    if isinstance(start, str) and _INTEGER.fullmatch(start.strip()):
        return int(start)
    return 1


def _parse_html(markup: str) -> ParsedText:
    return _HtmlWalker().walk(BeautifulSoup(markup, "html.parser"))
