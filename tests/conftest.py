import warnings

import pytest

from quietlayer.engine import ResolutionWarning


@pytest.fixture(autouse=True)
def _quiet_resolution_warnings():
    # Tests that care about the warning check it explicitly.
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ResolutionWarning)
        yield
