"""Measured retrieval quality: labeled queries, trec_eval-compatible measures, tests, reports.

Pure code: the search itself arrives through the ``EvaluationBackend`` protocol, so the same
evaluation runs against the store directly and against a server over HTTP.
"""
