"""Candidate masks, lexical and semantic rankings of the candidates, and their fusion."""
