import os
import pathlib

import pytest

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")

ARTIFACTS = pathlib.Path(__file__).parent / "artifacts"


@pytest.fixture
def artifacts() -> pathlib.Path:
    """Folder for screenshots and figures a person looks at (kept by CI, git-ignored)."""
    ARTIFACTS.mkdir(exist_ok=True)
    return ARTIFACTS
