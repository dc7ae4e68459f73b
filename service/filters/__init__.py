"""CQL2 filters (OGC 21-065): parsing, rendering, type checking and the in-memory engine."""
