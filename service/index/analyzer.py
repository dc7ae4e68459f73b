"""Turns text into the lexical tokens that BM25 counts, for documents and queries alike.

Documents and queries must go through the same analyzer, so each collection keeps its settings
(stop words on or off, stemming language or none) and the index analyses both with them.
Tokens are Unicode word characters (``\\w+``), lower-cased; stop words are removed before
stemming, so the stop list is matched against the words as written.

The English stop-word list ships in ``english_stopwords.txt`` beside this module: it is the
33-word list that the bm25s package uses for ``"en"`` (``bm25s.stopwords.STOPWORDS_EN``), kept
identical so that the Cranfield reference figures computed with that package are comparable.
"""

from __future__ import annotations

import re
import threading
from functools import cache
from importlib import resources

import Stemmer

_WORD = re.compile(r"\w+")


@cache
def english_stopwords() -> frozenset[str]:
    """The shipped English stop-word list (see the module docstring for its source)."""
    text = resources.files("service.index").joinpath("english_stopwords.txt").read_text("utf-8")
    words = (line.strip() for line in text.splitlines())
    return frozenset(word for word in words if word and not word.startswith("#"))


class Analyzer:
    """Word tokens, lower case, optional stop-word removal, optional Snowball stemming."""

    def __init__(
        self,
        stopwords: frozenset[str] | None,
        stem_language: str | None,
        *,
        title_weight: int = 1,
        section_weight: int = 1,
    ) -> None:
        if title_weight < 1 or section_weight < 1:
            raise ValueError("field weights must be at least 1")
        self.stopwords = stopwords or frozenset()
        self.stem_language = stem_language
        self.title_weight = title_weight
        self.section_weight = section_weight
        if stem_language is not None:
            # Fails early, with PyStemmer's own message, on a language it does not know.
            Stemmer.Stemmer(stem_language)
        # PyStemmer's stemmer objects are not safe to share between threads; queries run on
        # several threads, so each thread gets its own.
        self._local = threading.local()

    @classmethod
    def english(cls) -> Analyzer:
        """The default: the shipped English stop words and the English Snowball stemmer."""
        return cls(english_stopwords(), "english")

    def tokens(self, text: str) -> list[str]:
        words = [w for w in _WORD.findall(text.lower()) if w not in self.stopwords]
        if self.stem_language is None:
            return words
        stems: list[str] = self._stemmer().stemWords(words)
        return stems

    def indexed_tokens(self, title: str, section: str, text: str) -> list[str]:
        """A chunk's indexed tokens: its title, section path and text, the title counted
        ``title_weight`` times and the section ``section_weight`` times.

        Counting a field's terms w times is how BM25F weights a field (Robertson, Zaragoza and
        Taylor, "Simple BM25 extension to multiple weighted fields", CIKM 2004: the weighted
        term frequencies and the weighted length are those of the field repeated w times), so
        BM25 over these tokens is BM25F with one k1 and b for every field.
        """
        return (
            self.tokens(title) * self.title_weight
            + self.tokens(section) * self.section_weight
            + self.tokens(text)
        )

    def _stemmer(self) -> Stemmer.Stemmer:
        stemmer = getattr(self._local, "stemmer", None)
        if stemmer is None:
            stemmer = Stemmer.Stemmer(self.stem_language)
            self._local.stemmer = stemmer
        return stemmer

    def __repr__(self) -> str:
        return (
            f"Analyzer(stopwords={len(self.stopwords)} words, stem_language={self.stem_language!r},"
            f" title_weight={self.title_weight}, section_weight={self.section_weight})"
        )
