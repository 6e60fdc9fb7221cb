"""Unit conversion factors into lotline's canonical units (lengths nm, coordinates mm, areas cm²).

Every factor is exact and comes from NIST Special Publication 811 (2008 edition, "Guide for the Use of the
International System of Units"): the SI prefixes of §4.3 / Table 5 (micro = 1e-6, milli = 1e-3, nano = 1e-9,
centi = 1e-2) and the ångström of Table 9 / Appendix B.8 (1 Å = 1e-10 m = 0.1 nm). Areas scale with the
square of the length factor (1 mm² = (0.1 cm)² = 0.01 cm²).
"""

from __future__ import annotations

# Length units in metres (NIST SP 811 §4.3 prefixes; Table 9 for the ångström).
_LENGTH_M: dict[str, float] = {
    "m": 1.0,
    "cm": 1e-2,
    "mm": 1e-3,
    "um": 1e-6,
    "µm": 1e-6,  # U+00B5 micro sign
    "μm": 1e-6,  # U+03BC Greek mu
    "nm": 1e-9,
    "A": 1e-10,
    "Å": 1e-10,  # U+00C5
    "\u212b": 1e-10,  # U+212B angstrom sign
    "angstrom": 1e-10,
}

_AREA_ALIASES = {
    "cm2": "cm",
    "cm²": "cm",
    "mm2": "mm",
    "mm²": "mm",
    "um2": "um",
    "µm2": "um",
    "µm²": "um",
    "m2": "m",
}

CANONICAL_LENGTH = "nm"
CANONICAL_COORDINATE = "mm"
CANONICAL_AREA = "cm2"


def length_factor(unit: str, to: str = CANONICAL_LENGTH) -> float:
    """Factor that converts a length in ``unit`` into ``to`` (nm by default).

    >>> length_factor("A")   # NIST SP 811 Table 9: 1 Å = 0.1 nm
    0.1
    """
    try:
        src, dst = _LENGTH_M[unit], _LENGTH_M[to]
    except KeyError as exc:
        raise KeyError(
            f"unknown length unit {exc.args[0]!r}; known: {', '.join(known_length_units())}"
        ) from None
    return _exact_ratio(src, dst)


def area_factor(unit: str, to: str = CANONICAL_AREA) -> float:
    """Factor that converts an area in ``unit`` (cm2, mm2, um2, m2) into ``to`` (cm² by default)."""
    try:
        src, dst = _AREA_ALIASES[unit], _AREA_ALIASES[to]
    except KeyError as exc:
        raise KeyError(
            f"unknown area unit {exc.args[0]!r}; known: {', '.join(sorted(_AREA_ALIASES))}"
        ) from None
    return float(f"{_exact_ratio(_LENGTH_M[src], _LENGTH_M[dst]) ** 2:.12g}")


def known_length_units() -> list[str]:
    """Length unit spellings a profile may use."""
    return sorted(_LENGTH_M)


def known_area_units() -> list[str]:
    """Area unit spellings a profile may use."""
    return sorted(_AREA_ALIASES)


def is_length_unit(unit: str) -> bool:
    return unit in _LENGTH_M


def is_area_unit(unit: str) -> bool:
    return unit in _AREA_ALIASES


def _exact_ratio(src_m: float, dst_m: float) -> float:
    # Ratios of powers of ten: round to 12 significant digits so 1e-6/1e-9 gives exactly 1000.0, not 999.9999.
    ratio = src_m / dst_m
    return float(f"{ratio:.12g}")
