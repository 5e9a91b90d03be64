"""Reading edge tables with DuckDB, mapping keys to ids, and partitioning edges into blocks."""
