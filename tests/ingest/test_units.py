"""Unit conversion factors against NIST Special Publication 811 (2008), "Guide for the Use of the SI"."""

import pytest

from ingest import units


# NIST SP 811 Table 9 / B.8: 1 Å = 1e-10 m = 0.1 nm exactly.
@pytest.mark.parametrize("spelling", ["A", "Å", "\u212b", "angstrom"])
def test_length_factor_angstrom_is_a_tenth_of_a_nanometre(spelling):
    assert units.length_factor(spelling) == 0.1


# NIST SP 811 §4.3 (Table 5 prefixes): micro = 1e-6, nano = 1e-9, so 1 µm = 1000 nm exactly.
@pytest.mark.parametrize("spelling", ["um", "µm", "μm"])
def test_length_factor_micrometre_is_a_thousand_nanometres(spelling):
    assert units.length_factor(spelling) == 1000.0


def test_length_factor_micrometre_to_millimetre_is_one_thousandth():
    # NIST SP 811 §4.3: milli = 1e-3, micro = 1e-6 -> 1 µm = 0.001 mm
    assert units.length_factor("um", "mm") == 0.001
    assert units.length_factor("mm", "mm") == 1.0


def test_area_factor_square_millimetre_is_a_hundredth_of_a_square_centimetre():
    # NIST SP 811 §4.3 prefixes squared: 1 mm² = (0.1 cm)² = 0.01 cm²
    assert units.area_factor("mm2") == 0.01
    assert units.area_factor("mm²") == 0.01
    assert units.area_factor("cm2") == 1.0


def test_area_factor_square_micrometre_is_1e8_of_a_square_centimetre():
    # NIST SP 811 §4.3: 1 µm = 1e-4 cm, so 1 µm² = 1e-8 cm²
    assert units.area_factor("um2") == 1e-8


def test_length_factor_unknown_unit_lists_known_ones():
    with pytest.raises(KeyError, match="unknown length unit 'furlong'; known: .*nm"):
        units.length_factor("furlong")
