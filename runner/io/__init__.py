"""Readers: input files in formats beyond CSV, Parquet and NDJSON, into polars frames and bad rows."""
