"""The accepted magnitude types: the IASPEI standard names apart from other names bulletins
carry, in every message that lists them."""

from __future__ import annotations

import pytest

from stations.schema import (
    IASPEI_STANDARD_TYPES,
    REPORTED_TYPES,
    MagnitudeType,
    normalise_magnitude_type,
)

#: IASPEI (2013), Summary of Magnitude Working Group recommendations on standard procedures for
#: determining earthquake magnitudes from digital data: ML, mb, mB_BB, Ms_20, Ms_BB, mb_Lg and
#: Mw are its standard names (also Bormann & Dewey 2014, NMSOP-2 IS 3.3, Table 1).
IASPEI_NAMES = ("ML", "mb", "mB_BB", "Ms_20", "Ms_BB", "mb_Lg", "Mw")


def test_standard_names_are_the_iaspei_ones_and_the_rest_are_reported() -> None:
    assert tuple(m.value for m in IASPEI_STANDARD_TYPES) == IASPEI_NAMES
    assert set(IASPEI_STANDARD_TYPES) | set(REPORTED_TYPES) == set(MagnitudeType)
    assert not set(IASPEI_STANDARD_TYPES) & set(REPORTED_TYPES)


def test_unknown_type_message_separates_standard_from_reported_names() -> None:
    with pytest.raises(ValueError) as info:
        normalise_magnitude_type("Mx")
    message = str(info.value)
    standard, _, reported = message.partition("(IASPEI standard names)")
    assert reported, message
    for name in IASPEI_NAMES:
        assert f" {name}," in standard or f" {name} " in standard, name
    for m in REPORTED_TYPES:
        assert m.value in reported and f" {m.value}," not in standard
    assert "accepted as reported" in reported
