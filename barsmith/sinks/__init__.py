"""Where bars go: Parquet files; the interface any sink implements."""
