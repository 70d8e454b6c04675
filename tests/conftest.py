"""Test-suite settings shared by every test file."""

from __future__ import annotations

import os

import pytest
from hypothesis import settings

# In CI (CI=true) property tests draw their examples from a fixed seed per test, so a run is
# reproducible and a red CI means a real regression; on a developer's machine they keep
# drawing new examples on every run (and remember failures in .hypothesis/), to find new cases.
settings.register_profile("ci", derandomize=True, database=None)
if os.environ.get("CI"):
    settings.load_profile("ci")


@pytest.fixture(autouse=True, scope="session")
def _private_bem_cache(tmp_path_factory):
    """Factorisations cached by the conductor solve go to a folder of this run, not the user's
    cache (see probeplan.bem.cache_dir)."""
    old = os.environ.get("PROBEPLAN_CACHE_DIR")
    os.environ["PROBEPLAN_CACHE_DIR"] = str(tmp_path_factory.mktemp("bem-cache"))
    yield
    if old is None:
        os.environ.pop("PROBEPLAN_CACHE_DIR", None)
    else:
        os.environ["PROBEPLAN_CACHE_DIR"] = old


@pytest.fixture(scope="module")
def threads_cluster():
    """A dask scheduler and two single-thread workers in this process (the cluster tests)."""
    distributed = pytest.importorskip("distributed")
    with distributed.LocalCluster(
        processes=False, n_workers=2, threads_per_worker=1, dashboard_address=":0"
    ) as cluster:
        yield cluster
