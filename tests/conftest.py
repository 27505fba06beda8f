import os
import pathlib

import pytest

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
# designed sections are cached on disk (livefilt.dsp.memo): the tests keep
# theirs in a folder of their own, not in the user's cache
if "LIVEFILT_CACHE_DIR" not in os.environ:
    import atexit
    import shutil
    import tempfile

    os.environ["LIVEFILT_CACHE_DIR"] = tempfile.mkdtemp(prefix="livefilt-test-cache-")
    atexit.register(shutil.rmtree, os.environ["LIVEFILT_CACHE_DIR"], ignore_errors=True)

ARTIFACTS = pathlib.Path(__file__).parent / "artifacts"


@pytest.fixture
def artifacts() -> pathlib.Path:
    """Folder for screenshots and figures a person looks at (kept by CI, git-ignored)."""
    ARTIFACTS.mkdir(exist_ok=True)
    return ARTIFACTS
