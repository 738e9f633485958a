"""Main panel "Posterior spread": the marked knots measured over many realisations of a model.

The user points at a folder (or glob pattern) of realisations on the
machine that runs the page, or uploads the files, and runs
`lensview.measure_ensemble` with a progress bar. For the chosen knot the
panel shows histograms of |mu| and of the offset across the realisations
(`lensview.figures.ensemble`), with the loaded models' own values marked, and
offers the summary and the per-realisation tables for download. The knots
are only read here; a failed run leaves them as they are.
"""

import tempfile
from pathlib import Path

import streamlit as st

from ..lens.loading import FROM_HEADER
from ..errors import LensviewInputError
from . import state as page_state
from .inputs import held_files, upload_slot

__all__ = ["ensemble_panel", "ENSEMBLE", "parse_thresholds"]

#: Session-state key of the last run: dict with summary, samples, note and the run's settings.
ENSEMBLE = "lv_ensemble"
FROM_FOLDER = "a folder or pattern on this machine"
FROM_UPLOADS = "uploaded files"
_MAX_UPLOADS = 400
_UNITS = {"as the files say (BUNIT)": None, "arcsec": "arcsec", "pixel": "pixel"}
_NORMS = {"as the files say (Z_NORM, else D_ls/D_s = 1)": FROM_HEADER, "D_ls/D_s = 1": None}
_FORMATS = {"ECSV": ".ecsv", "CSV": ".csv", "VOTable": ".vot"}
_MIME = {".ecsv": "text/plain", ".csv": "text/csv", ".vot": "application/x-votable+xml"}


def parse_thresholds(text):
    """Magnification thresholds from a comma-separated text ("10, 100")."""
    try:
        return [float(part) for part in text.replace(";", ",").split(",") if part.strip()]
    except ValueError:
        raise LensviewInputError(
            f"{text!r} is not a list of |\u03bc| thresholds; give numbers separated by commas, "
            "e.g. 10, 100.") from None


def _sources(state, where, scene, units, z_norm):
    """What to hand `measure_ensemble`: the folder text, or loaders of the uploads."""
    from ..ensemble import RealisationFiles, group_model_files

    if where == FROM_FOLDER:
        text = (state.get("lv_ens_folder") or "").strip()
        if not text:
            raise LensviewInputError("Give the folder (or glob pattern) that holds the realisations.")
        return text
    held = {h.name: h for h in held_files(state, "ensemble")}
    if not held:
        raise LensviewInputError("No realisation is uploaded; upload the realisations' FITS files.")
    return [RealisationFiles(name, tuple((f, held[f].content) for f in files), z_lens=scene.z_lens,
                             units=units, z_norm=z_norm, cosmology=scene.cosmology)
            for name, files in group_model_files(list(held))]


def _run(state, scene, z_source, where, units, z_norm, thresholds_text):
    from ..ensemble import measure_ensemble

    coords = page_state.candidate_coords(state)
    labels = page_state.candidate_labels(state)
    bar = st.progress(0.0, text="Measuring the knots on every realisation...")

    def progress(done, total):
        bar.progress(done / total, text=f"{done} of {total} realisations measured")

    try:
        thresholds = parse_thresholds(thresholds_text)
        sources = _sources(state, where, scene, units, z_norm)
        summary, samples = measure_ensemble(
            coords, sources, z_source, z_lens=scene.z_lens, units=units, z_norm=z_norm,
            cosmology=scene.cosmology, labels=labels, mu_thresholds=thresholds,
            progress=progress, return_samples=True)
    except LensviewInputError as error:
        state["lv_ens_error"] = str(error)
        return
    finally:
        bar.empty()
    state.pop("lv_ens_error", None)
    state[ENSEMBLE] = dict(summary=summary, samples=samples, z_source=float(z_source),
                           labels=list(labels), scene=scene.key)


def _table_bytes(table, suffix, cosmology):
    from ..io import write_table

    with tempfile.TemporaryDirectory(prefix="lensview-") as folder:
        path = Path(folder) / f"table{suffix}"
        write_table(table, path, cosmology=cosmology)
        return path.read_bytes()


def ensemble_panel(state, scene, z_source, results):
    """Draw the panel; ``results`` are the page's measurements of the loaded models."""
    st.caption("Lens modellers publish many realisations of a model drawn from its posterior. "
               "Measure your knots on all of them to see how far each one's magnification and "
               "offset can be trusted.")
    where = st.radio("Realisations from", [FROM_FOLDER, FROM_UPLOADS], key="lv_ens_from",
                     horizontal=True)
    if where == FROM_FOLDER:
        st.text_input("Folder or glob pattern", key="lv_ens_folder",
                      placeholder="/data/realisations  or  /data/realisations/*_alpha_?.fits",
                      help="Pairs named *_alpha_x / *_alpha_y (or _x / _y, _defx / _defy) make one "
                           "realisation; any other FITS file is one realisation with two image "
                           "HDUs or a two-plane cube.")
    else:
        upload_slot(state, "Realisation files (FITS)", "ensemble", keep=_MAX_UPLOADS,
                    help="Upload every realisation's files at once; x/y pairs are matched by name.")
    left, middle, right = st.columns(3)
    units = _UNITS[left.selectbox("Deflection units", list(_UNITS), key="lv_ens_units")]
    z_norm = _NORMS[middle.selectbox("Normalisation", list(_NORMS), key="lv_ens_norm")]
    thresholds_text = right.text_input("|\u03bc| thresholds", "10, 100", key="lv_ens_thresholds",
                                       help="Columns with the share of realisations whose |\u03bc| "
                                            "exceeds each value.")
    labels = page_state.candidate_labels(state)
    if st.button("Measure the knots on every realisation", key="lv_ens_run", disabled=not labels,
                 type="primary"):
        _run(state, scene, z_source, where, units, z_norm, thresholds_text)
    if not labels:
        st.caption("Mark knots on the picture first.")
    message = state.get("lv_ens_error")
    if message:
        st.error(message)
    run = state.get(ENSEMBLE)
    if run is None:
        return
    _show(state, scene, z_source, results, run, labels)


def _show(state, scene, z_source, results, run, labels):
    from ..figures import render_ensemble_histograms

    summary, samples = run["summary"], run["samples"]
    if run["z_source"] != float(z_source) or run["labels"] != labels or run["scene"] != scene.key:
        st.info(f"These results are for z_source = {run['z_source']:g} and the knots "
                f"{', '.join(run['labels'])}; measure again to follow the current ones.")
    for broken in summary.meta.get("broken", []):
        st.warning(f"Left out {broken['name']}: {broken['message']}")
    st.markdown(f"**{len(summary)} knot(s) over {summary.meta['n_realisations']} realisation(s)**")
    st.dataframe(summary.to_pandas(), hide_index=True, key="lv_ens_table")
    knot = st.selectbox("Knot", list(summary["label"]), key="lv_ens_knot")
    best = results.table if results.table is not None and knot in labels else None
    figure = render_ensemble_histograms(samples, knot, best=best)
    st.pyplot(figure, clear_figure=False)
    if best is not None:
        st.caption("Dashed lines: the loaded models' own values for this knot.")
    choice = st.selectbox("Table format", list(_FORMATS), key="lv_ens_format")
    suffix = _FORMATS[choice]
    left, right = st.columns(2)
    left.download_button("Download the summary", data=_table_bytes(summary, suffix, scene.cosmology),
                         file_name=f"posterior_spread{suffix}", mime=_MIME[suffix],
                         key="lv_ens_dl_summary", on_click="ignore")
    right.download_button("Download every realisation's rows",
                          data=lambda: _table_bytes(samples, suffix, scene.cosmology),
                          file_name=f"posterior_realisations{suffix}", mime=_MIME[suffix],
                          key="lv_ens_dl_samples", on_click="ignore")
