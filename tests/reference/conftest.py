"""Shared fixtures for the reference tests: libveer through ctypes, and random bundles."""
import os

import pytest

import veerlib


@pytest.fixture(scope="session")
def lib():
    """libveer through ctypes; a missing symbol fails the tests (it is a broken library)."""
    return veerlib.load_library()


@pytest.fixture(scope="session")
def build_dir():
    return os.environ["VEER_BUILD_DIR"]


@pytest.fixture(scope="session")
def source_dir():
    return os.environ.get("VEER_SOURCE_DIR",
                          os.path.abspath(os.path.join(os.path.dirname(__file__), "..", "..")))
