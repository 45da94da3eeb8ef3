"""Suite-wide fixtures: keep the frame cache and matplotlib out of the user's home folder."""

import os

import matplotlib
import pytest

matplotlib.use("Agg")


@pytest.fixture(autouse=True, scope="session")
def _private_cache(tmp_path_factory):
    old = os.environ.get("KINECAST_CACHE_DIR")
    os.environ["KINECAST_CACHE_DIR"] = str(tmp_path_factory.mktemp("kinecast_cache"))
    yield
    if old is None:
        os.environ.pop("KINECAST_CACHE_DIR", None)
    else:
        os.environ["KINECAST_CACHE_DIR"] = old
