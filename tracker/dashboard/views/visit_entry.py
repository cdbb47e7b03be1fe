"""New study: enter a visit's nerve tests and stimulation sites, or upload a file; both go through the
importer's checks (nothing is saved until everything is valid, and warnings are read before saving)."""

from __future__ import annotations

import datetime as dt

import pandas as pd
import streamlit as st

from tracker.dashboard.state import choose_patient, reading, user, writing
from tracker.domain.labels import column_label
from tracker.domain.vocabulary import DIAGNOSES, MODALITIES, PHENOTYPES, SEXES, SIDE_ALIASES
from tracker.errors import InputRejected
from tracker.services.entry import (
    GRID_TITLES,
    NERVE_KEY,
    EntryResult,
    empty_layout,
    enter_visit,
    import_upload,
    layout_from_latest_visit,
    patient_details,
    upload_notes,
)

PROBLEMS_KEY = "entry_problems"
NOTES_KEY = "entry_notes"  # the last check's outcome: checked / pending (warnings to accept) / saved
TEMPLATE_KEY = "entry_template"  # the site grid the editor starts from (a copied layout)
NERVE_TEMPLATE_KEY = "entry_nerve_template"  # the nerve-test grid the editor starts from
TEMPLATE_VERSION_KEY = "entry_template_version"
DETAIL_KEYS = {
    "patient": "entry_patient",
    "sex": "entry_sex",
    "birth_year": "entry_birth_year",
    "diagnosis": "entry_diagnosis",
    "phenotype": "entry_phenotype",
    "height_cm": "entry_height",
}
START = empty_layout(
    [{"nerve": "median", "side": "right", "modality": "motor"}],
    [
        {"nerve": "median", "side": "right", "modality": "motor", "site_order": 1, "site": "wrist"},
        {"nerve": "median", "side": "right", "modality": "motor", "site_order": 2, "site": "elbow"},
    ],
)


def _key_columns() -> dict[str, object]:
    sides = sorted(set(SIDE_ALIASES.values()))
    return {
        "nerve": st.column_config.TextColumn(column_label("nerve")),
        "side": st.column_config.SelectboxColumn(column_label("side"), options=sides),
        "modality": st.column_config.SelectboxColumn(column_label("modality"), options=list(MODALITIES)),
    }


def _numbers(columns: list[str]) -> dict[str, object]:
    return {c: st.column_config.NumberColumn(column_label(c)) for c in columns}


NERVE_CONFIG = {
    **_key_columns(),
    "recording_site": st.column_config.TextColumn(column_label("recording_site")),
    **_numbers(["temperature_c", "lff_hz"]),
    "f_latency_ms": st.column_config.TextColumn(
        column_label("f_latency_ms"), help="Minimal F-wave latency in ms, or “absent”."
    ),
    **_numbers(["f_persistence_pct"]),
    "wrist_entrapment": st.column_config.CheckboxColumn(
        column_label("wrist_entrapment"),
        help="Median nerve only: the median distal latency is judged explained by neuropathy at the wrist.",
    ),
}
SITE_CONFIG = {
    **_key_columns(),
    "site_order": st.column_config.NumberColumn(column_label("site_order"), min_value=1, step=1),
    "site": st.column_config.TextColumn(column_label("site")),
    **_numbers(
        [
            "distance_mm",
            "latency_ms",
            "amplitude_mv",
            "amplitude_uv",
            "duration_ms",
            "area_mvms",
            "peak_latency_ms",
        ]
    ),
}


def _field_errors(name: str) -> None:
    for message in st.session_state.get(PROBLEMS_KEY, {}).get("visit", {}).get(name, []):
        st.markdown(f":red[**{column_label(name)}:** {message}]")


def _grid(frame: pd.DataFrame) -> pd.DataFrame:
    return frame.set_axis(
        pd.RangeIndex(1, len(frame) + 1)
    )  # grids number rows from 1; messages use that number


def _listed(notes: list[tuple[str, str]]) -> str:
    return "\n".join(f"- **{where}:** {message}" if where else f"- {message}" for where, message in notes)


def _remember(result: EntryResult, action: str) -> None:
    """Keep what the check found for the next run of the page (the form is redrawn after each action)."""
    notes = {
        "warnings": [(n.where, n.message) for n in result.warnings],
        "accepted": [n.text for n in result.warnings],
        "unusual": [(n.where, n.message) for n in result.unusual],
    }
    if not result.valid:
        st.session_state[PROBLEMS_KEY] = {
            "visit": result.visit_problems,
            "other": result.other_problems,
            "rows": [
                (GRID_TITLES[n.grid], n.row, column_label(n.field) if n.field else "", n.message)
                for n in result.row_problems
            ],
        }
        st.session_state.pop(NOTES_KEY, None)
        return
    st.session_state.pop(PROBLEMS_KEY, None)
    if result.saved:
        notes["state"] = "saved"
    else:
        notes["state"] = "checked" if action == "check" else "pending"
    notes["summary"] = result.report.summary()
    st.session_state[NOTES_KEY] = notes


st.title("New study")
tab_form, tab_upload = st.tabs(["Enter by hand", "Upload a file"])

with tab_form:
    st.caption(
        "Nerve-test values (temperature, filter, F-waves) once per nerve test; one row per stimulation site, "
        "distal site = 1. Motor amplitude in mV, sensory in µV; no response: amplitude 0 and latency empty."
    )
    with st.expander("Start from the layout of a patient's latest visit (nerves, sites, distances)"):
        layout_code = st.text_input("Patient code", key="entry_layout_code")
        if st.button("Copy layout", key="entry_layout_go") and layout_code.strip():
            with reading() as session:
                layout = layout_from_latest_visit(session, layout_code.strip())
                details = patient_details(session, layout_code.strip())
            st.session_state[TEMPLATE_KEY] = layout.sites
            st.session_state[NERVE_TEMPLATE_KEY] = layout.nerves
            # The copy keeps the patient's details: code, sex, birth year, diagnosis, phenotype, height.
            for name, key in DETAIL_KEYS.items():
                if details.get(name) is not None:
                    st.session_state[key] = details[name]
            st.session_state[TEMPLATE_VERSION_KEY] = st.session_state.get(TEMPLATE_VERSION_KEY, 0) + 1
            st.rerun()
    version = st.session_state.get(TEMPLATE_VERSION_KEY, 0)
    notes = st.session_state.get(NOTES_KEY, {})
    with st.form("entry_form", clear_on_submit=False):
        cols = st.columns(4)
        with cols[0]:
            patient = st.text_input(
                "Patient code",
                key="entry_patient",
                help="The clinic's pseudonymous code; a new code creates a patient.",
            )
            _field_errors("patient")
        with cols[1]:
            visit_date = st.date_input(
                "Visit date",
                value=dt.date.today(),
                key="entry_date",
                max_value=dt.date.today(),
                format="YYYY-MM-DD",
            )
            _field_errors("visit_date")
        with cols[2]:
            height = st.number_input(
                "Height (cm)", min_value=0.0, max_value=250.0, value=None, key="entry_height"
            )
            _field_errors("height_cm")
        with cols[3]:
            diagnosis = st.selectbox(
                "Diagnosis",
                [None, *DIAGNOSES],
                key="entry_diagnosis",
                format_func=lambda v: "—" if v is None else v,
            )
            _field_errors("diagnosis")
        cols = st.columns(4)
        with cols[0]:
            sex = st.selectbox(
                "Sex", [None, *SEXES], key="entry_sex", format_func=lambda v: "—" if v is None else v
            )
            _field_errors("sex")
        with cols[1]:
            birth_year = st.number_input(
                "Birth year",
                min_value=1900,
                max_value=dt.date.today().year,
                value=None,
                step=1,
                key="entry_birth_year",
            )
            _field_errors("birth_year")
        with cols[2]:
            phenotype = st.selectbox(
                "CIDP phenotype",
                [None, *PHENOTYPES],
                key="entry_phenotype",
                format_func=lambda v: "—" if v is None else v,
            )
            _field_errors("phenotype")
        with cols[3]:
            allow_unusual = st.checkbox("Accept unusual values (recorded)", key="entry_unusual")
        st.markdown(
            f"**{GRID_TITLES['nerves'].capitalize()}** — one row per nerve test; "
            "its values apply to all its sites"
        )
        nerves = st.data_editor(
            _grid(st.session_state.get(NERVE_TEMPLATE_KEY, START.nerves)),
            key=f"entry_nerves_{version}",
            num_rows="dynamic",
            hide_index=False,
            width="stretch",
            column_config=NERVE_CONFIG,
        )
        st.markdown(
            f"**{GRID_TITLES['sites'].capitalize()}** — one row per site, matched to its nerve test by "
            f"{', '.join(column_label(c) for c in NERVE_KEY)}"
        )
        sites = st.data_editor(
            _grid(st.session_state.get(TEMPLATE_KEY, START.sites)),
            key=f"entry_sites_{version}",
            num_rows="dynamic",
            hide_index=False,
            width="stretch",
            column_config=SITE_CONFIG,
        )
        cols = st.columns(3)
        check = cols[0].form_submit_button("Check only (nothing saved)")
        save = cols[1].form_submit_button("Check and save", type="primary")
        confirm = (
            cols[2].form_submit_button("Save with these warnings")
            if notes.get("state") == "pending"
            else False
        )
    if check or save or confirm:
        visit = {
            "patient": patient,
            "visit_date": visit_date,
            "height_cm": height,
            "sex": sex,
            "birth_year": birth_year,
            "diagnosis": diagnosis,
            "phenotype": phenotype,
        }
        with writing() as session:
            result = enter_visit(
                session,
                visit,
                sites,
                nerves,
                username=user(),
                allow_unusual=allow_unusual,
                dry_run=bool(check),
                accepted_warnings=notes.get("accepted", []) if confirm else (),
            )
        _remember(result, "check" if check else "save")
        if result.saved:
            choose_patient(patient.strip())
            st.session_state[NOTES_KEY]["saved"] = f"Saved: {patient.strip()} {visit_date.isoformat()}"
        st.rerun()
    problems = st.session_state.get(PROBLEMS_KEY)
    if problems:
        places = (["the fields marked in red"] if problems["visit"] else []) + (
            ["the grid rows listed below (numbered as in each grid)"] if problems["rows"] else []
        )
        st.error(
            "Nothing was saved. "
            + (
                f"Please correct {' and '.join(places)}, then check again."
                if places
                else "Please correct the problems below, then check again."
            )
        )
        for message in problems["other"]:
            st.markdown(f"- {message}")
        if problems["rows"]:
            rows = pd.DataFrame(problems["rows"], columns=["grid", "row", "field", "problem"])
            st.dataframe(rows, hide_index=True, width="stretch", key="entry_row_problems")
    if notes.get("state") == "checked":
        st.info(f"Check passed; nothing was saved. {notes['summary']}.")
    elif notes.get("state") == "pending":
        st.warning(
            "Not saved yet: please read the warnings below. Correct the entry and check again, or press "
            "“Save with these warnings” to save it as it is."
        )
    elif notes.get("state") == "saved":
        st.success(f"{notes['saved']} — {notes['summary']}. Open it on the Follow-up or Visit review page.")
    if notes.get("warnings"):
        heading = (
            "Saved with these warnings"
            if notes["state"] == "saved"
            else "Warnings (the visit can be saved all the same)"
        )
        st.warning(f"{heading}:\n\n{_listed(notes['warnings'])}")
    if notes.get("unusual"):
        st.info(f"Unusual values accepted (recorded with the visit):\n\n{_listed(notes['unusual'])}")

with tab_upload:
    st.caption(
        "Measurements, treatments or scores, as CSV (UTF-8) or .xlsx in the interchange format "
        "(README, “File formats”)."
    )
    upload = st.file_uploader("File", type=["csv", "xlsx"], key="entry_upload")
    cols = st.columns(3)
    dry_run = cols[0].checkbox("Check only (dry run)", key="upload_dry")
    replace = cols[1].checkbox("Replace changed visits (history kept)", key="upload_replace")
    unusual = cols[2].checkbox("Accept unusual values (recorded)", key="upload_unusual")
    if upload is not None and st.button("Import", key="upload_go", type="primary"):
        try:
            with writing() as session:
                report = import_upload(
                    session,
                    upload.getvalue(),
                    upload.name,
                    username=user(),
                    dry_run=dry_run,
                    replace=replace,
                    allow_unusual=unusual,
                )
            st.success(report.summary())
            rows = "rows as the file numbers them, header = row 1"
            if report.warnings:
                done = "would be imported" if report.dry_run else "imported"
                st.warning(f"Warnings — {done} all the same, but worth a look ({rows}):")
                st.dataframe(
                    upload_notes(report.warnings, "warning"),
                    hide_index=True,
                    width="stretch",
                    key="upload_warnings",
                )
            if report.unusual:
                st.info(f"Unusual values accepted, recorded with the visit ({rows}):")
                st.dataframe(
                    upload_notes(report.unusual, "note"),
                    hide_index=True,
                    width="stretch",
                    key="upload_unusual_values",
                )
        except InputRejected as error:
            st.error(
                f"{error.summary} — nothing was imported (rows as the file numbers them, header = row 1)."
            )
            st.dataframe(upload_notes(error.problems), hide_index=True, width="stretch")
