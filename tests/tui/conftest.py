"""Fixtures of the terminal queue tests: the workflow's small projects and a screenshot folder."""

import pytest

from tests.common import REPO

# the small projects of the workflow tests (one image of 2 x 3 tiles), shared, not copied
from tests.workflow.conftest import overlap_project, project  # noqa: F401

#: Where the screenshots of the screens go (git-ignored).
ARTEFACTS = REPO / "test-artefacts" / "tui"


@pytest.fixture
def artefacts():
    ARTEFACTS.mkdir(parents=True, exist_ok=True)
    return ARTEFACTS
