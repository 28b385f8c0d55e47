"""Shared pytest set-up: fixture plugins of tests/*_fixtures.py modules."""

pytest_plugins = ["prom_fixtures", "sandbox_fixtures"]
