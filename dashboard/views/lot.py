"""Lot: one lot across layers. Its measurements in route order with the process history, wafer maps of
site values (radial profile, zone means), defect maps, and the commonality and process-or-metrology results
of the excursions it belongs to."""

from __future__ import annotations

import polars as pl
import streamlit as st

from dashboard import charts, data, widgets


def _stage_caution(stage: str | None, meas: pl.DataFrame, at_layer: pl.DataFrame) -> None:
    """Rework caution for the layer shown: after-etch data, or develop data of a lot since measured after etch."""
    if stage == "etch":
        widgets.caution("rework_after_etch")
    elif stage == "develop":
        since = at_layer["first_measured_at"].min()
        etched = meas.filter((pl.col("stage") == "etch") & (pl.col("first_measured_at") > since))
        if etched.height:
            first = etched.sort("first_measured_at").row(0, named=True)
            widgets.caution(
                "rework_etched_since", layer=first["layer"], at=f"{first['first_measured_at']:%Y-%m-%d %H:%M}"
            )
        else:
            widgets.caution("rework_before_etch")


def main() -> None:
    st.title("Lot")
    lot = widgets.text_param("Lot id", key="lot", placeholder="e.g. a lot id from a signal")
    if not lot:
        widgets.nothing("Enter a lot id, or open a lot from a chart point or a signal.")

    frames = data.load(
        {
            "meas": ("lot_measurements", {"lot_id": lot}),
            "hist": ("lot_process_history", {"lot_id": lot}),
            "exc": ("lot_excursions", {"lot_id": lot}),
        }
    )
    meas, hist, exc = frames["meas"], frames["hist"], frames["exc"]
    if meas.height == 0 and hist.height == 0:
        widgets.not_found("Lot", lot)

    st.subheader("Measurements along the route")
    widgets.table(meas, key="lot_measurements")
    st.subheader("Process history")
    if hist.height:
        widgets.table(hist, key="lot_history")
    else:
        st.info("No process history stored for this lot.")

    if meas.height:
        st.subheader("Wafer maps")
        c1, c2, c3 = st.columns(3)
        layers = list(dict.fromkeys(meas["layer"].to_list()))
        layer = widgets.choice("Layer", layers, key="layer", container=c1)
        at_layer = meas.filter(pl.col("layer") == layer)
        parameter = widgets.choice("Parameter", list(dict.fromkeys(at_layer["parameter"].to_list())), key="parameter",
                                   container=c2)  # fmt: skip
        wafers = list(dict.fromkeys(at_layer.filter(pl.col("parameter") == parameter)["wafer_id"].to_list()))
        wafer = widgets.choice("Wafer", wafers, key="wafer", container=c3)
        stage = at_layer["stage"][0] if at_layer.height else None
        sites = data.load_one("wafer_sites", lot_id=lot, wafer_id=wafer, layer=layer, parameter=parameter)
        unit = sites["unit"][0] if sites.height else ""
        m1, m2 = st.columns([3, 2])
        m1.plotly_chart(charts.wafer_map(sites, title=f"{lot} / {wafer}: {layer} {parameter}", unit=unit),
                        key="wafer_map", width="stretch")  # fmt: skip
        m2.plotly_chart(charts.radial_profile(sites, unit=unit), key="radial_profile", width="stretch")
        sig = data.wafer_signature(lot, wafer, layer, parameter)
        if sig is not None:
            m2.plotly_chart(
                charts.zone_means_chart(sig["zones"], unit=unit), key="zone_means", width="stretch"
            )
            with st.expander("Signature fits (radial, Zernike families)"):
                if sig["radial"] is not None:
                    widgets.table(sig["radial"], key="radial_fit")
                widgets.table(sig["families"], key="zernike_families")
        _stage_caution(stage, meas, at_layer)

        defects = data.load_one("wafer_defects", lot_id=lot, wafer_id=wafer)
        st.subheader("Defect map")
        st.plotly_chart(charts.defect_map(defects, title=f"{lot} / {wafer}: defects"), key="defect_map",
                        width="stretch")  # fmt: skip

    st.subheader("Excursions of this lot")
    if exc.height == 0:
        st.info("No signal of this lot belongs to an excursion.")
        return
    exc = exc.with_columns(
        pl.col("excursion_id").map_elements(lambda v: widgets.page_url("excursions", excursion=v), return_dtype=pl.String)
        .alias("open")
    )  # fmt: skip
    widgets.table(exc, columns=["excursion_id", "state", "severity", "chart", "layer", "parameter", "process_tool",
                                "chamber", "metrology_tool", "first_at", "last_at", "n_signals", "open"],
                  key="lot_excursions", open=st.column_config.LinkColumn("open", display_text="open"))  # fmt: skip
    ids = exc["excursion_id"].to_list()
    excursion_id = widgets.choice("Excursion for commonality", ids, key="excursion", default=ids[0])
    ranked = data.excursion_commonality(excursion_id)
    st.subheader("Commonality")
    if ranked is None or ranked.height == 0:
        st.info("No process history around this excursion to compare.")
    else:
        widgets.table(ranked.head(15), columns=["rank", "step", "kind", "candidate", "n_affected", "n_lots",
                                                "share_of_step", "odds_ratio", "test", "q_assoc", "ran_most_lots",
                                                "reason"], key="commonality")  # fmt: skip
    widgets.caution("commonality")
    attribution = data.excursion_attribution(excursion_id)
    st.subheader("Process or metrology?")
    if attribution is None:
        st.info("No process-or-metrology verdict is available for this excursion.")
    else:
        widgets.table(attribution, key="attribution")
    widgets.caution("signals")


main()
