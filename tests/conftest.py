from __future__ import annotations

import os
import shutil
from pathlib import Path

import pytest

ARTIFACTS = Path(__file__).resolve().parent.parent / "artifacts"


@pytest.fixture(autouse=True, scope="session")
def _cache_dir(tmp_path_factory):
    d = tmp_path_factory.mktemp("wbx-cache")
    old = os.environ.get("WBEXPLORE_CACHE")
    os.environ["WBEXPLORE_CACHE"] = str(d)
    yield d
    if old is None:
        os.environ.pop("WBEXPLORE_CACHE", None)
    else:
        os.environ["WBEXPLORE_CACHE"] = old


@pytest.fixture(scope="session")
def demo_dir(tmp_path_factory):
    from wbexplore.demo import write_demo

    d = tmp_path_factory.mktemp("demo") / "study"
    write_demo(d)
    return d


@pytest.fixture(scope="session")
def demo_series(demo_dir):
    import warnings

    from wbexplore.pipeline import CoverageWarning, extract

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", CoverageWarning)  # fennel cuts Zefron by design
        return extract(demo_dir / "catalog.yaml")


@pytest.fixture(scope="session")
def demo_truth(demo_dir):
    import xarray as xr

    with xr.open_dataset(demo_dir / "truth.nc") as t:
        return t.load()


@pytest.fixture(scope="session")
def artifacts():
    ARTIFACTS.mkdir(exist_ok=True)
    return ARTIFACTS


def copy_demo(demo_dir, tmp_path) -> Path:
    dest = tmp_path / "study"
    shutil.copytree(demo_dir, dest)
    return dest
