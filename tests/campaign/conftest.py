from __future__ import annotations

import pytest

from tests.campaign.helpers import cli, write_recipe


@pytest.fixture(scope="session")
def reference_store(tmp_path_factory):
    """An undisturbed run of the base test recipe on 2 local worker processes."""
    d = tmp_path_factory.mktemp("reference")
    recipe = write_recipe(d / "recipe.toml")
    store = d / "store"
    proc = cli("run", recipe, "--store", store, "--workers", "2")
    assert proc.returncode == 0, proc.stdout + proc.stderr
    return store
