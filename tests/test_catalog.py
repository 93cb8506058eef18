"""Catalog v1 validation: every refusal names the file, the source and the field; exit 2; nothing written."""

import numpy as np
import pytest
import yaml

from utils import box_basins, lonlat_grid, monthly, write_catalog, write_nc
from wbexplore.cli import main
from wbexplore.errors import CatalogError
from wbexplore.io.catalog import open_catalog


@pytest.fixture
def folder(tmp_path):
    lon, lat = lonlat_grid(-2, 2, 0, 4, 0.5)
    write_nc(tmp_path / "rain.nc", np.ones((12, lat.size, lon.size)), lon, lat, monthly("2001-01", 12), var="pr")
    box_basins(tmp_path / "basins.geojson", [(-1, 1, 1, 3)])
    return tmp_path


def good_sources():
    return [{"id": "rain_a", "component": "P", "path": "rain.nc", "variable": "pr", "units": "mm/day"}]


def test_valid_catalog_opens(folder):
    cat = open_catalog(write_catalog(folder, good_sources()))
    assert [s.id for s in cat.sources] == ["rain_a"]
    assert cat.sources[0].paths[0] == folder / "rain.nc"
    assert len(cat.sha256) == 64


def _edit(folder, mutate):
    p = write_catalog(folder, good_sources())
    data = yaml.safe_load(p.read_text())
    mutate(data)
    p.write_text(yaml.safe_dump(data))
    return p


CASES = [
    ("unknown top-level key", lambda d: d.update(sourcez=[]), ["'sourcez'", "did you mean 'sources'"]),
    ("unknown source key", lambda d: d["sources"][0].update(compnent="P"), ["source 'rain_a'", "'compnent'"]),
    ("missing required", lambda d: d["sources"][0].pop("component"), ["source 'rain_a'", "'component'", "missing"]),
    ("duplicate id", lambda d: d["sources"].append(dict(d["sources"][0])), ["duplicate source id 'rain_a'"]),
    ("unknown component", lambda d: d["sources"][0].update(component="RUNOFF"), ["'component'", "'RUNOFF'"]),
    ("path matches nothing", lambda d: d["sources"][0].update(path="nope/*.nc"), ["source 'rain_a'", "'path'", "nope/*.nc"]),
    ("wrong version", lambda d: d.update(catalog_version=3), ["'catalog_version'", "3"]),  # 1 and 2 are read
    ("wrong unit dimension", lambda d: d["sources"][0].update(units="degC"), ["source 'rain_a'", "'units'", "degC"]),
    ("basin file missing", lambda d: d["basins"].update(path="gone.shp"), ["basins", "'path'", "gone.shp"]),
    ("bad crs", lambda d: d["sources"][0].update(crs="EPSG:99999999"), ["'crs'", "EPSG:99999999"]),
]


@pytest.mark.parametrize("what, mutate, expect", CASES, ids=[c[0] for c in CASES])
def test_refusals_via_cli(folder, capsys, what, mutate, expect):
    cat = _edit(folder, mutate)
    out = folder / "series.nc"
    rc = main(["extract", str(cat), "--out", str(out), "--quiet"])
    err = capsys.readouterr().err
    assert rc == 2
    assert str(cat) in err
    for e in expect:
        assert e in err, err
    assert len(err.strip().splitlines()) == 1  # one line
    assert not out.exists()  # nothing written
    assert not list(folder.glob(".series.nc*"))


def test_not_yaml(folder):
    p = folder / "bad.yaml"
    p.write_text("catalog_version: 1\nsources: [a, b\n")
    with pytest.raises(CatalogError, match="not valid YAML"):
        open_catalog(p)


def test_safe_loader_refuses_python_tags(folder):
    p = folder / "evil.yaml"
    p.write_text("catalog_version: !!python/object/apply:os.system ['echo hi']\n")
    with pytest.raises(CatalogError):
        open_catalog(p)


def test_check_prints_summary(folder, capsys):
    cat = write_catalog(folder, good_sources())
    assert main(["check", str(cat)]) == 0
    out = capsys.readouterr().out
    assert "rain_a" in out and "8x8" in out and "2001-01..2001-12" in out and "EPSG:4326" in out
