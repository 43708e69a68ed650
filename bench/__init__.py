"""Benchmarks for lytestream: generated feeds and the ingest benchmark. Not part of the service."""
