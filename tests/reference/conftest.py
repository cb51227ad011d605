"""Shared fixtures for the reference tests: libveer through ctypes, and random bundles."""
import os

import pytest

import veerlib


@pytest.fixture(scope="session")
def lib():
    """libveer, or a skip naming what is missing while the runtime is still being written."""
    try:
        return veerlib.load_library()
    except AttributeError as e:
        pytest.skip(f"libveer does not export the runtime API yet: {e}")


@pytest.fixture(scope="session")
def build_dir():
    return os.environ["VEER_BUILD_DIR"]


@pytest.fixture(scope="session")
def source_dir():
    return os.environ.get("VEER_SOURCE_DIR",
                          os.path.abspath(os.path.join(os.path.dirname(__file__), "..", "..")))
