import os
import tempfile
import warnings

import pytest

# The suite's references go to a folder of its own, not the user's cache.
os.environ.setdefault("QUIETLAYER_CACHE_DIR", tempfile.mkdtemp(prefix="quietlayer-test-cache-"))

from quietlayer.engine import ResolutionWarning


@pytest.fixture(autouse=True)
def _quiet_resolution_warnings():
    # Tests that care about the warning check it explicitly.
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ResolutionWarning)
        yield
