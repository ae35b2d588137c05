"""Fixtures shared by the io tests."""

import pytest
from io_helpers import make_recording


@pytest.fixture
def recording():
    """A small invented recording with trials and label columns of four kinds."""
    return make_recording()
