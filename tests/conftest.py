"""Fixtures shared by the workspace and hardening tests."""
import pytest

from review_helpers import depot_found
from slicefind.review.queue import build_queue
from slicefind.workspace import Workspace, data_fingerprint


@pytest.fixture(scope="module")
def depot():
    return depot_found()


@pytest.fixture()
def ws(tmp_path, depot):
    """A workspace holding the depot scan (with its image paths) and a 40-row queue."""
    frame, found = depot
    workspace = Workspace(tmp_path / "ws")
    workspace.save_scan(found, data_fingerprint=data_fingerprint(frame), show=("label_image",))
    workspace.save_queue(build_queue(workspace.load_found(), budget=40, show=("label_image",)))
    yield workspace
    workspace.close()
