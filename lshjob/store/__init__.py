"""The refresh store: per-period sets and signatures in Parquet files, and a DuckDB catalog."""
