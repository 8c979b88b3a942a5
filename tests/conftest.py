"""Shared fixtures: stores built once per session in temporary folders."""

from __future__ import annotations

import shutil
from pathlib import Path

import os

import pytest
from hypothesis import settings

from tracker.store.bootstrap import open_store

# Property tests replay the same examples on every run (derandomize) so that a run that
# lands is reproducible; HYPOTHESIS_PROFILE=explore searches afresh, with more examples,
# to find new counterexamples (add what it finds as fixed cases).
settings.register_profile("default", derandomize=True)
settings.register_profile("explore", derandomize=False, max_examples=1000)
settings.load_profile(os.environ.get("HYPOTHESIS_PROFILE", "default"))


@pytest.fixture(scope="session")
def demo_store_template(tmp_path_factory) -> Path:
    """A demo store (history only, no estimates) built once; copy it before writing."""
    folder = tmp_path_factory.mktemp("demo-template")
    store, _ = open_store(folder / "store.duckdb")
    return store.path


@pytest.fixture()
def demo_store(demo_store_template, tmp_path):
    """A private copy of the demo store: (Store, Config)."""
    target = tmp_path / "store"
    shutil.copytree(demo_store_template.parent, target)
    return open_store(target / "store.duckdb")


@pytest.fixture()
def empty_store(tmp_path):
    return open_store(tmp_path / "empty" / "store.duckdb", create_demo=False)


@pytest.fixture(scope="session")
def estimated_demo_template(tmp_path_factory, demo_store_template) -> Path:
    """The demo store after the initial estimation (about a minute on two cores)."""
    from tracker.service.estimate import update

    folder = tmp_path_factory.mktemp("estimated-template")
    shutil.copytree(demo_store_template.parent, folder, dirs_exist_ok=True)
    store, config = open_store(folder / "store.duckdb")
    update(store, config)
    return store.path


@pytest.fixture()
def estimated_demo_store(estimated_demo_template, tmp_path):
    target = tmp_path / "estimated"
    shutil.copytree(estimated_demo_template.parent, target)
    return open_store(target / "store.duckdb")
