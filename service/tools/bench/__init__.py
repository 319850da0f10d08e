"""Benchmarks behind `keelson bench engine|http|worker` (figures, not tests)."""
