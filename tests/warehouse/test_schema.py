"""The canonical schema: declarations are complete and self-consistent."""

import pytest

from warehouse import schema


def test_every_canonical_column_has_a_doc_and_known_dtype():
    for t in schema.TABLES:
        assert t.doc, t.name
        for c in t.columns:
            assert c.doc.strip(), f"{t.name}.{c.name}"
            assert c.dtype in schema.DTYPES


def test_every_fact_table_carries_lineage():
    for t in schema.FACT_TABLES:
        for name in schema.LINEAGE_COLUMNS:
            assert name in t.names, f"{t.name} lacks {name}"


def test_length_columns_use_canonical_units():
    # DESIGN.md: lengths in nm, coordinates in mm, areas in cm².
    for t in schema.TABLES:
        for c in t.columns:
            if c.name.endswith("_mm"):
                assert c.unit == "mm"
            if c.name.endswith("_nm"):
                assert c.unit == "nm"
            if c.name.endswith("_cm2"):
                assert c.unit == "cm2"


def test_column_lookup_lists_existing_columns_on_a_typo():
    with pytest.raises(KeyError) as err:
        schema.MEASUREMENTS.column("wafer")
    assert "Existing columns: lot_id, wafer_id" in str(err.value)


def test_table_lookup_unknown_lists_known_tables():
    with pytest.raises(KeyError, match="Known tables: measurements"):
        schema.table("measurement")


def test_column_without_doc_is_refused():
    with pytest.raises(ValueError, match="needs a doc line"):
        schema.Column("x", schema.STRING)


def test_data_dictionary_lists_every_table():
    text = schema.data_dictionary_markdown()
    for t in schema.TABLES:
        assert f"### `{t.name}`" in text
