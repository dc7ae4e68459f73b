from service.index.analyzer import Analyzer, english_stopwords


def test_english_analyzer_lowercases_drops_stop_words_and_stems() -> None:
    assert Analyzer.english().tokens("The Brakes are SQUEALING on wet rims") == [
        "brake",
        "squeal",
        "wet",
        "rim",
    ]


def test_tokens_are_unicode_words() -> None:
    analyzer = Analyzer(stopwords=None, stem_language=None)
    assert analyzer.tokens("Größe: naïve café—x2, über!") == [
        "größe",
        "naïve",
        "café",
        "x2",
        "über",
    ]


def test_stemming_and_stop_words_can_be_turned_off() -> None:
    assert Analyzer(None, None).tokens("the running riders") == ["the", "running", "riders"]


def test_shipped_stop_word_list_is_the_short_english_list() -> None:
    words = english_stopwords()
    assert len(words) == 33
    assert {"the", "and", "with", "into"} <= words
    assert "#" not in "".join(words)
