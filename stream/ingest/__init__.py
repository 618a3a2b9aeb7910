"""Ingest: source files (Matrix Market, triplets, npz; targets, weights) into a store."""

from ranktide.ingest.build import IngestSummary, ingest

ingest_file = ingest

__all__ = ["IngestSummary", "ingest", "ingest_file"]
