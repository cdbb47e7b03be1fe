"""New study: enter a visit's nerve tests and stimulation sites, or upload a file; both go through the
importer's checks (nothing is saved until everything is valid)."""

from __future__ import annotations

import datetime as dt

import pandas as pd
import streamlit as st

from tracker.dashboard.state import choose_patient, reading, user, writing
from tracker.domain.vocabulary import DIAGNOSES, PHENOTYPES, SEXES
from tracker.errors import InputRejected
from tracker.domain.labels import column_label
from tracker.services.entry import SITE_COLUMNS, enter_visit, import_upload, layout_from_latest_visit, patient_details

PROBLEMS_KEY = "entry_problems"
TEMPLATE_KEY = "entry_template"  # the site table the editor starts from (a copied layout)
TEMPLATE_VERSION_KEY = "entry_template_version"
DETAIL_KEYS = {"patient": "entry_patient", "sex": "entry_sex", "birth_year": "entry_birth_year", "diagnosis": "entry_diagnosis",
               "phenotype": "entry_phenotype", "height_cm": "entry_height"}
st.title("New study")
tab_form, tab_upload = st.tabs(["Enter by hand", "Upload a file"])


def _field_errors(name: str) -> None:
    for message in st.session_state.get(PROBLEMS_KEY, {}).get("visit", {}).get(name, []):
        st.markdown(f":red[**{column_label(name)}:** {message}]")


EMPTY = pd.DataFrame(
    {
        "nerve": pd.Series(["median", "median"], dtype=object), "side": ["right", "right"], "modality": ["motor", "motor"],
        "site_order": [1, 2], "site": ["wrist", "elbow"],
        **{c: pd.Series([None, None], dtype=float) for c in SITE_COLUMNS if c not in ("nerve", "side", "modality", "site_order", "site")},
    }
)[SITE_COLUMNS]

with tab_form:
    st.caption("One row per stimulation site, distal site = 1. Motor amplitude in mV, sensory in µV; no response: amplitude 0 and latency empty.")
    with st.expander("Start from the layout of a patient's latest visit (nerves, sites, distances)"):
        layout_code = st.text_input("Patient code", key="entry_layout_code")
        if st.button("Copy layout", key="entry_layout_go") and layout_code.strip():
            with reading() as session:
                st.session_state[TEMPLATE_KEY] = layout_from_latest_visit(session, layout_code.strip())
                details = patient_details(session, layout_code.strip())
            # The copy keeps the patient's details: code, sex, birth year, diagnosis, phenotype, height.
            for name, key in DETAIL_KEYS.items():
                if details.get(name) is not None:
                    st.session_state[key] = details[name]
            st.session_state[TEMPLATE_VERSION_KEY] = st.session_state.get(TEMPLATE_VERSION_KEY, 0) + 1
            st.rerun()
    with st.form("entry_form", clear_on_submit=False):
        cols = st.columns(4)
        with cols[0]:
            patient = st.text_input("Patient code", key="entry_patient", help="The clinic's pseudonymous code; a new code creates a patient.")
            _field_errors("patient")
        with cols[1]:
            visit_date = st.date_input("Visit date", value=dt.date.today(), key="entry_date", max_value=dt.date.today(), format="YYYY-MM-DD")
            _field_errors("visit_date")
        with cols[2]:
            height = st.number_input("Height (cm)", min_value=0.0, max_value=250.0, value=None, key="entry_height")
            _field_errors("height_cm")
        with cols[3]:
            diagnosis = st.selectbox("Diagnosis", [None, *DIAGNOSES], key="entry_diagnosis", format_func=lambda v: "—" if v is None else v)
            _field_errors("diagnosis")
        cols = st.columns(4)
        with cols[0]:
            sex = st.selectbox("Sex", [None, *SEXES], key="entry_sex", format_func=lambda v: "—" if v is None else v)
            _field_errors("sex")
        with cols[1]:
            birth_year = st.number_input("Birth year", min_value=1900, max_value=dt.date.today().year, value=None, step=1, key="entry_birth_year")
            _field_errors("birth_year")
        with cols[2]:
            phenotype = st.selectbox("CIDP phenotype", [None, *PHENOTYPES], key="entry_phenotype", format_func=lambda v: "—" if v is None else v)
            _field_errors("phenotype")
        with cols[3]:
            allow_unusual = st.checkbox("Accept unusual values (recorded)", key="entry_unusual")
        start = st.session_state.get(TEMPLATE_KEY, EMPTY)
        start = start.set_axis(pd.RangeIndex(1, len(start) + 1))  # the grid numbers rows from 1; problems use that number
        sites = st.data_editor(
            start, key=f"entry_sites_{st.session_state.get(TEMPLATE_VERSION_KEY, 0)}", num_rows="dynamic", hide_index=False, width="stretch",
            column_config={
                "site_order": st.column_config.NumberColumn("site order", min_value=1, step=1),
                "distance_mm": st.column_config.NumberColumn("distance (mm)"), "latency_ms": st.column_config.NumberColumn("latency (ms)"),
                "amplitude_mv": st.column_config.NumberColumn("amplitude (mV, motor)"), "amplitude_uv": st.column_config.NumberColumn("amplitude (µV, sensory)"),
                "temperature_c": st.column_config.NumberColumn("temperature (°C)"), "f_latency_ms": st.column_config.NumberColumn("F-wave latency (ms)"),
                "duration_ms": st.column_config.NumberColumn("duration (ms)"), "area_mvms": st.column_config.NumberColumn("area (mV·ms)"),
                "peak_latency_ms": st.column_config.NumberColumn("peak latency (ms)"), "lff_hz": st.column_config.NumberColumn("low-frequency filter (Hz)"),
                "f_persistence_pct": st.column_config.NumberColumn("F-wave persistence (%)"),
            },
        )
        submitted = st.form_submit_button("Check and save", type="primary")
    if submitted:
        visit = {"patient": patient, "visit_date": visit_date, "height_cm": height, "sex": sex, "birth_year": birth_year, "diagnosis": diagnosis, "phenotype": phenotype}
        with writing() as session:
            result = enter_visit(session, visit, sites, username=user(), allow_unusual=allow_unusual)
        if result.saved:
            st.session_state.pop(PROBLEMS_KEY, None)
            choose_patient(patient.strip())
            st.session_state["entry_saved"] = f"Saved: {patient.strip()} {visit_date.isoformat()} — {result.report.summary()}"
            st.rerun()
        else:
            st.session_state[PROBLEMS_KEY] = {"visit": result.visit_problems, "rows": result.row_problems, "other": result.other_problems}
            st.rerun()
    problems = st.session_state.get(PROBLEMS_KEY)
    if problems:
        places = (["the fields marked in red"] if problems["visit"] else []) + (["the grid rows listed below (numbered as in the grid)"] if problems["rows"] else [])
        st.error("Nothing was saved. " + (f"Please correct {' and '.join(places)}, then save again." if places else "Please correct the problems below, then save again."))
        for message in problems["other"]:
            st.markdown(f"- {message}")
        if problems["rows"]:
            rows = pd.DataFrame([(r, column_label(f) if f else "", m) for r, f, m in problems["rows"]], columns=["row", "field", "problem"])
            st.dataframe(rows, hide_index=True, width="stretch", key="entry_row_problems")
    if "entry_saved" in st.session_state:
        st.success(st.session_state["entry_saved"] + ". Open it on the Follow-up or Visit review page.")

with tab_upload:
    st.caption("Measurements, treatments or scores, as CSV (UTF-8) or .xlsx in the interchange format (README, “File formats”).")
    upload = st.file_uploader("File", type=["csv", "xlsx"], key="entry_upload")
    cols = st.columns(3)
    dry_run = cols[0].checkbox("Check only (dry run)", key="upload_dry")
    replace = cols[1].checkbox("Replace changed visits (history kept)", key="upload_replace")
    unusual = cols[2].checkbox("Accept unusual values (recorded)", key="upload_unusual")
    if upload is not None and st.button("Import", key="upload_go", type="primary"):
        try:
            with writing() as session:
                report = import_upload(session, upload.getvalue(), upload.name, username=user(), dry_run=dry_run, replace=replace, allow_unusual=unusual)
            st.success(report.summary())
        except InputRejected as error:
            st.error(f"{error.summary} — nothing was imported.")
            st.dataframe(pd.DataFrame([{"row": p.row, "column": p.column, "value": p.value, "problem": p.message} for p in error.problems]), hide_index=True, width="stretch")
