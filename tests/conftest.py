"""Shared pytest set-up: the service fixtures (PostgreSQL, Chromium) from tests/services.py."""

import os

os.environ.setdefault("MPLBACKEND", "Agg")

pytest_plugins = ["services"]
