"""Survey-level plugins: statistics, per-sample summaries, the report, compare and aggregate."""
