"""Filters inferred from a question: the clauses a careful reader would have written.

Deterministic and pure: a per-version ``Lexicon`` of the collection's attribute values, names,
units and schema hints (``lexicon``), the question's words, numbers and times (``words``,
``mentions``), and the engine that turns them into checked clauses, each with the words that
produced it, dropping any clause that would leave no candidate (``engine``).
"""
