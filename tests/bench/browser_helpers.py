"""The browser tests' own server and page helpers (tests/browser/conftest.py),
loaded for the page benchmarks so they drive the page exactly as the tests do."""

from __future__ import annotations

import importlib.util
from pathlib import Path


def load():
    path = Path(__file__).resolve().parents[1] / "browser" / "conftest.py"
    spec = importlib.util.spec_from_file_location("quietlayer_browser_helpers", path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module
