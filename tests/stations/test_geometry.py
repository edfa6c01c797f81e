"""Vectorized distances and azimuths against obspy's geodetics (the reference)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from obspy.geodetics import (
    degrees2kilometers,
    gps2dist_azimuth,
    kilometers2degrees,
    locations2degrees,
)

from stations.errors import DomainError
from stations.geometry import (
    degrees_to_kilometres,
    geodesic_inverse,
    great_circle_degrees,
    hypocentral_distance_km,
    kilometres_to_degrees,
)
from tests.datasets import YELLOWSTONE_CSV
from tests.reference import formulas as ref

YELLOWSTONE = YELLOWSTONE_CSV


def _random_pairs(n: int, seed: int) -> tuple[np.ndarray, ...]:
    rng = np.random.default_rng(seed)
    lat1 = rng.uniform(-89.0, 89.0, n)
    lat2 = rng.uniform(-89.0, 89.0, n)
    lon1 = rng.uniform(-180.0, 180.0, n)
    lon2 = rng.uniform(-180.0, 180.0, n)
    return lat1, lon1, lat2, lon2


def _angle_gap(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    return np.abs((a - b + 180.0) % 360.0 - 180.0)


def test_geodesic_matches_obspy_gps2dist_azimuth() -> None:
    """obspy 1.5.1 gps2dist_azimuth (Vincenty; geographiclib absent) on 3,000 random pairs.

    Rotated so the event sits at longitude 0 (geodesics do not change under a common
    longitude shift): agreement within 1 mm and 1e-6 deg (Vincenty's own accuracy is mm).
    """
    lat1, lon1, lat2, lon2 = _random_pairs(3000, seed=11)
    dlon = (lon2 - lon1 + 180.0) % 360.0 - 180.0
    ours = geodesic_inverse(lat1, lon1, lat2, lon2)
    theirs = np.array(
        [gps2dist_azimuth(a, 0.0, b, c) for a, b, c in zip(lat1, lat2, dlon, strict=True)]
    )
    far = locations2degrees(lat1, lon1, lat2, lon2) > 179.0  # near-antipodal: skip, see below
    assert np.all(ours.converged[~far])
    np.testing.assert_allclose(
        ours.distance_km[~far] * 1000.0, theirs[~far, 0], rtol=0, atol=ref.GEODESIC_TOL_M
    )
    assert np.max(_angle_gap(ours.azimuth, theirs[:, 1])[~far]) < ref.AZIMUTH_TOL_DEG
    assert np.max(_angle_gap(ours.back_azimuth, theirs[:, 2])[~far]) < ref.AZIMUTH_TOL_DEG


def test_geodesic_close_to_obspy_without_rotation() -> None:
    """Unrotated input: obspy's unwrapped longitude difference costs it up to a few cm."""
    lat1, lon1, lat2, lon2 = _random_pairs(2000, seed=12)
    ours = geodesic_inverse(lat1, lon1, lat2, lon2)
    theirs = np.array([gps2dist_azimuth(*p) for p in zip(lat1, lon1, lat2, lon2, strict=True)])
    far = locations2degrees(lat1, lon1, lat2, lon2) > 179.0
    np.testing.assert_allclose(
        ours.distance_km[~far] * 1000.0,
        theirs[~far, 0],
        rtol=0,
        atol=ref.GEODESIC_UNROTATED_TOL_M,
    )


def test_seismological_distances_are_exact_within_a_millimetre() -> None:
    """Hand-picked event-station pairs, including the dateline and the poles."""
    pairs = np.array(
        [
            [44.0, -110.0, 44.6, -110.4],
            [35.0, 179.5, 36.0, -179.5],
            [-89.5, 10.0, -60.0, -170.0],
            [0.0, 0.0, 0.0, 90.0],  # along the equator
            [10.0, 20.0, 10.0, 20.0],  # coincident
        ]
    )
    ours = geodesic_inverse(*pairs.T)
    for k, (a, b, c, d) in enumerate(pairs):
        dist, az, baz = gps2dist_azimuth(a, b, c, d)
        assert ours.distance_km[k] * 1000.0 == pytest.approx(dist, abs=ref.GEODESIC_TOL_M)
        assert _angle_gap(np.array(ours.azimuth[k]), np.array(az)) < ref.AZIMUTH_TOL_DEG
        assert _angle_gap(np.array(ours.back_azimuth[k]), np.array(baz)) < ref.AZIMUTH_TOL_DEG


def test_antipodal_pairs_fall_back_to_the_sphere() -> None:
    """Vincenty fails near the antipode; the fallback is a sphere of radius 6371.0088 km."""
    out = geodesic_inverse(0.0, 0.0, 0.5, 179.7)
    assert not bool(out.converged)
    expected = np.radians(locations2degrees(0.0, 0.0, 0.5, 179.7)) * 6371.0088
    assert float(out.distance_km) == pytest.approx(expected, rel=1e-12)
    # within the documented 0.5 % of the ellipsoidal value (half the meridian is 20,003.9 km)
    assert float(out.distance_km) == pytest.approx(20003.9, rel=5e-3)


def test_great_circle_degrees_is_obspy_locations2degrees() -> None:
    lat1, lon1, lat2, lon2 = _random_pairs(500, seed=13)
    np.testing.assert_allclose(
        great_circle_degrees(lat1, lon1, lat2, lon2),
        locations2degrees(lat1, lon1, lat2, lon2),
        rtol=0,
        atol=1e-12,
    )


def test_kilometre_degree_conversions_follow_obspy() -> None:
    km = np.array([0.0, 1.0, 111.19, 5000.0, 20000.0])
    np.testing.assert_allclose(
        kilometres_to_degrees(km), [kilometers2degrees(k) for k in km], rtol=1e-14
    )
    deg = np.array([0.0, 1.0, 90.0, 180.0])
    np.testing.assert_allclose(
        degrees_to_kilometres(deg), [degrees2kilometers(d) for d in deg], rtol=1e-14
    )


def test_nan_propagates_and_bad_latitude_raises() -> None:
    out = geodesic_inverse([np.nan, 10.0], [0.0, 0.0], [5.0, 11.0], [5.0, 0.0])
    assert np.isnan(out.distance_km[0]) and np.isfinite(out.distance_km[1])
    with pytest.raises(DomainError, match=r"latitude 91 deg is outside \[-90, 90\]"):
        geodesic_inverse(91.0, 0.0, 0.0, 0.0)
    with pytest.raises(DomainError, match="latitude"):
        great_circle_degrees(0.0, 0.0, -95.0, 0.0)


def test_hypocentral_distance() -> None:
    assert float(hypocentral_distance_km(30.0, 40.0)) == pytest.approx(50.0)
    assert float(hypocentral_distance_km(30.0, 38.0, 2.0)) == pytest.approx(50.0)
    assert np.isnan(hypocentral_distance_km(np.nan, 1.0))


def test_yellowstone_rhyp_is_the_right_triangle_of_repi_and_depth() -> None:
    """Real data (Holt et al. 2022): Rhyp = sqrt(Repi^2 + EqDep^2) on all 7,728 rows."""
    table = pd.read_csv(YELLOWSTONE, usecols=["Repi", "EqDep", "Rhyp"])
    np.testing.assert_allclose(
        hypocentral_distance_km(table["Repi"], table["EqDep"]),
        table["Rhyp"],
        rtol=0,
        atol=ref.YELLOWSTONE_RHYP_TOL_KM,
    )
