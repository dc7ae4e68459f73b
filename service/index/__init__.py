"""The in-memory index of a collection: analyzer, BM25 postings, vectors, snapshots."""
