from __future__ import annotations

import numpy as np
import pandas as pd
import pyproj
import pytest

from comove.errors import InputError
from comove.io.projection import (
    crs_to_lonlat,
    local_metric_crs,
    max_scale_error,
    to_lonlat,
    to_metric,
)
from comove.io.reading import ColumnSpec, read_tracks
from comove.tracks.cleaning import clean_fixes

# Reference for true distances: pyproj's geodesic (Karney's algorithm in PROJ) on WGS84.
WGS84_GEOD = pyproj.Geod(ellps="WGS84")


def _params(crs: pyproj.CRS) -> dict[str, str]:
    return dict(part.lstrip("+").split("=", 1) for part in crs.srs.split() if "=" in part)


def _dms(degrees: int, minutes: int, seconds: float) -> float:
    return degrees + minutes / 60 + seconds / 3600


def test_reference_geodesic_on_published_example() -> None:
    # Flinders Peak -> Buninyong, the worked inverse example (Vincenty's formulae, GRS80) of
    # the Geocentric Datum of Australia technical manual; coordinates and results recalled
    # from memory of that manual.
    lat1, lon1 = -_dms(37, 57, 3.72030), _dms(144, 25, 29.52440)
    lat2, lon2 = -_dms(37, 39, 10.15610), _dms(143, 55, 35.38390)
    azimuth, back_azimuth, distance = pyproj.Geod(ellps="GRS80").inv(lon1, lat1, lon2, lat2)
    assert distance == pytest.approx(54_972.271, abs=1e-3)
    assert (azimuth % 360) * 3600 == pytest.approx(_dms(306, 52, 5.37) * 3600, abs=0.01)
    assert (back_azimuth % 360) * 3600 == pytest.approx(_dms(127, 10, 25.07) * 3600, abs=0.01)


@pytest.mark.parametrize("lat0", [0.02, -0.4, 35.0, -47.5, 60.0])
def test_local_plane_distances_match_geodesic(lat0: float) -> None:
    lon0 = 23.4
    bearings = np.array([0.0, 37.0, 90.0, 145.0, 222.0, 300.0])
    separations = np.array([10.0, 100.0, 1_000.0, 10_000.0])
    az, dist = (a.ravel() for a in np.meshgrid(bearings, separations))
    # Pairs start at points scattered about the centre, as real data would be.
    rng = np.random.default_rng(3)
    start_lon = lon0 + rng.uniform(-0.1, 0.1, az.size)
    start_lat = lat0 + rng.uniform(-0.05, 0.05, az.size)
    end_lon, end_lat, _ = WGS84_GEOD.fwd(start_lon, start_lat, az, dist)
    crs = local_metric_crs(np.r_[start_lon, end_lon], np.r_[start_lat, end_lat])
    x1, y1 = to_metric(start_lon, start_lat, crs)
    x2, y2 = to_metric(end_lon, end_lat, crs)
    planar = np.hypot(x2 - x1, y2 - y1)
    _, _, geodesic = WGS84_GEOD.inv(start_lon, start_lat, end_lon, end_lat)
    np.testing.assert_allclose(planar, geodesic, rtol=1e-3)  # the promised 0.1 %
    # Within ~15 km of the centre the scale error is a few ppm at most.
    np.testing.assert_allclose(planar, geodesic, rtol=1e-5)


def test_centre_is_bounding_box_midpoint() -> None:
    crs = local_metric_crs(np.array([10.0, 12.0, 11.5]), np.array([50.0, 54.0, 51.0]))
    params = _params(crs)
    assert params["proj"] == "laea"
    assert float(params["lon_0"]) == pytest.approx(11.0)
    assert float(params["lat_0"]) == pytest.approx(52.0)
    assert params["units"] == "m"
    assert params["datum"] == "WGS84"


def test_centre_across_the_antimeridian() -> None:
    crs = local_metric_crs(np.array([179.9, -179.8, 179.95]), np.array([-16.0, -16.2, -16.1]))
    # The occupied interval is 179.9 .. 180.2 (= -179.8), so the centre is 180.05 = -179.95.
    assert float(_params(crs)["lon_0"]) == pytest.approx(-179.95)
    x, y = to_metric(np.array([179.9, -179.8]), np.array([-16.0, -16.2]), crs)
    _, _, geodesic = WGS84_GEOD.inv(179.9, -16.0, -179.8, -16.2)
    assert np.hypot(x[1] - x[0], y[1] - y[0]) == pytest.approx(geodesic, rel=1e-5)
    assert np.all(np.abs(x) < 20_000)


def test_centre_ignores_non_finite_and_needs_one_point() -> None:
    crs = local_metric_crs(np.array([5.0, np.nan, 7.0]), np.array([1.0, 2.0, np.inf]))
    assert float(_params(crs)["lon_0"]) == pytest.approx(5.0)
    with pytest.raises(ValueError, match="finite"):
        local_metric_crs(np.array([np.nan]), np.array([1.0]))


def test_round_trip() -> None:
    lon = np.array([-3.2, -3.1, -3.0])
    lat = np.array([55.9, 56.0, 56.1])
    crs = local_metric_crs(lon, lat)
    back_lon, back_lat = to_lonlat(*to_metric(lon, lat, crs), crs)
    np.testing.assert_allclose(back_lon, lon, atol=1e-9)
    np.testing.assert_allclose(back_lat, lat, atol=1e-9)


def test_crs_to_lonlat_and_bad_crs() -> None:
    x, y = pyproj.Transformer.from_crs(4326, 3857, always_xy=True).transform(12.5, 41.9)
    lon, lat = crs_to_lonlat(np.array([x]), np.array([y]), "EPSG:3857")
    assert lon[0] == pytest.approx(12.5) and lat[0] == pytest.approx(41.9)
    with pytest.raises(InputError, match="--crs"):
        crs_to_lonlat(np.array([0.0]), np.array([0.0]), "not a crs")


def test_max_scale_error() -> None:
    # Mercator's point scale is sec(latitude) (Snyder, Map Projections: A Working Manual,
    # USGS 1987; recalled from memory), i.e. 2 at 60°.
    assert max_scale_error(np.array([10.0]), np.array([60.0]), "EPSG:3857") == pytest.approx(
        1.0, abs=1e-3
    )
    # UTM's central-meridian scale factor is 0.9996 (same source).
    assert max_scale_error(np.array([9.0]), np.array([50.0]), "EPSG:32632") == pytest.approx(
        4e-4, rel=1e-3
    )
    assert max_scale_error(np.array([np.nan]), np.array([0.0]), "EPSG:32632") == 0.0


def test_web_mercator_input_gives_true_distances() -> None:
    # Two invented fixes 1 km apart due east at 60°N, written in Web Mercator metres.
    lat0, lon0 = 60.0, 5.0
    lon1, lat1, _ = WGS84_GEOD.fwd(lon0, lat0, 90.0, 1_000.0)
    to_3857 = pyproj.Transformer.from_crs(4326, 3857, always_xy=True)
    x, y = to_3857.transform(np.array([lon0, lon1]), np.array([lat0, lat1]))
    frame = pd.DataFrame(
        {"id": ["v1", "v1"], "t": [0, 10], "x": x, "y": y, "role": ["boat", "boat"]}
    )
    mercator_length = np.hypot(x[1] - x[0], y[1] - y[0])
    # Web Mercator is about 1/cos(lat) too long, twice the true distance at 60°N (the
    # spherical formula leaves out the ellipsoid's flattening, worth a few tenths of a percent).
    assert mercator_length == pytest.approx(2_000.0, rel=5e-3)

    fixes, quality = clean_fixes(read_tracks(frame, ColumnSpec(crs="EPSG:3857")))
    length = np.hypot(fixes.x[1] - fixes.x[0], fixes.y[1] - fixes.y[0])
    assert length == pytest.approx(1_000.0, rel=1e-5)
    assert fixes.input_crs == "EPSG:3857"
    assert fixes.metric_crs is not None and _params(fixes.metric_crs)["proj"] == "laea"
    assert quality["coordinates"]["input"] == "crs"


def test_projection_on_threads_gives_the_same_numbers(monkeypatch) -> None:
    # blocks of points on several threads, each with its own transformer, against one pass
    from comove.io import projection

    rng = np.random.default_rng(2)
    lon, lat = rng.uniform(9.5, 10.5, 5_000), rng.uniform(49.5, 50.5, 5_000)
    crs = projection.local_metric_crs(lon, lat)
    one = projection.to_metric(lon, lat, crs)
    monkeypatch.setattr(projection, "PROJECT_BLOCK", 700)
    threaded = projection.to_metric(lon, lat, crs, workers=3)
    np.testing.assert_array_equal(threaded[0], one[0])
    np.testing.assert_array_equal(threaded[1], one[1])


def _centre(lon: np.ndarray) -> float:
    from comove.io.projection import LonLatExtent

    extent = LonLatExtent.of(lon, np.zeros_like(lon))
    if extent.needs_bins:
        extent = LonLatExtent.of(lon, np.zeros_like(lon), bins=True)
    return extent.centre()[0]


@pytest.mark.parametrize("seed", range(8))
def test_longitude_centre_is_the_middle_of_the_shortest_interval_holding_all(seed) -> None:
    # reference: every point tried as the western end of the interval (brute force)
    rng = np.random.default_rng(seed)
    spread = [5.0, 90.0, 179.0, 200.0, 300.0, 10.0, 120.0, 250.0][seed]
    lon = rng.uniform(0, spread, 50) + rng.uniform(-180, 180)
    lon = np.mod(lon + 180.0, 360.0) - 180.0
    widths = [np.max(np.mod(lon - w, 360.0)) for w in lon]
    west = lon[int(np.argmin(widths))]
    expected = np.mod(west + min(widths) / 2 + 180.0, 360.0) - 180.0
    assert _centre(lon) == pytest.approx(expected, abs=1e-9)
    # longitudes written 0..360 (or beyond) are wrapped first: the same centre
    assert _centre(lon + 360.0) == pytest.approx(expected, abs=1e-9)


@pytest.mark.parametrize("spread", [3.0, 170.0, 200.0, 350.0])
def test_extents_of_blocks_joined_give_the_whole_data_crs_exactly(spread) -> None:
    # the working plane of data read in blocks is the one of the data read at once
    from comove.io.projection import LonLatExtent, local_metric_crs, metric_crs_of

    rng = np.random.default_rng(int(spread))
    lon = np.mod(rng.uniform(0, spread, 5000) + 150.0 + 180.0, 360.0) - 180.0
    lat = rng.uniform(-60, 70, lon.size)
    lon[::97] = np.nan  # missing values are ignored in both
    whole = local_metric_crs(lon, lat)
    cuts = np.sort(rng.choice(np.arange(1, lon.size), 6, replace=False))
    # straddling the antimeridian, even a spread under 180 degrees needs the bins
    bins = LonLatExtent.of(lon, lat).needs_bins
    assert bins == (spread > 30)
    blocks = zip(np.split(lon, cuts), np.split(lat, cuts), strict=True)
    parts = [LonLatExtent.of(a, b, bins=bins) for a, b in blocks]
    joined = parts[0]
    for part in parts[1:]:
        joined = part.then(joined)  # any order
    assert joined.needs_bins == bins
    assert metric_crs_of(joined).to_proj4() == whole.to_proj4()


def test_an_extent_without_bins_refuses_a_spread_it_cannot_centre() -> None:
    from comove.io.projection import LonLatExtent

    extent = LonLatExtent.of(np.array([-170.0, 20.0, 170.0]), np.zeros(3))
    with pytest.raises(ValueError, match="needs its bins"):
        extent.centre()
    with pytest.raises(ValueError, match="at least one finite"):
        LonLatExtent.of(np.array([np.nan]), np.array([1.0])).centre()
