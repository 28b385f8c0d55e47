"""Benchmarks: scripts that print figures (``python -m tests.bench.<name>``), never timed assertions."""
