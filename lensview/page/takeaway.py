"""Main panel "Download and restore": downloads, and bringing a session or catalogue back.

Downloads are produced on demand (the button's data is a callable), by the
export functions of `lensview.io` and `lensview.figures`, written to a
temporary folder and handed over as bytes. `download_producers` builds the
same callables for tests and scripts.
"""

import tempfile
from pathlib import Path

import numpy as np
import streamlit as st
from astropy.table import Table

from ..errors import LensviewInputError
from . import state as page_state
from .inputs import upload_limit_mb
from .sky import LIMIT_CHOICES

__all__ = ["download_producers", "takeaway_panel", "session_document", "table_unavailable"]

REGION_FORMATS = {"FITS region table (.fits)": ".fits", "ECSV vertex table (.ecsv)": ".ecsv",
                  "VOTable vertex table (.vot)": ".vot"}
TABLE_FORMATS = {"ECSV (.ecsv)": ".ecsv", "CSV (.csv)": ".csv", "VOTable (.vot)": ".vot"}
FIGURE_FORMATS = {"PNG (.png)": ".png", "PDF (.pdf)": ".pdf"}
#: Session-state key of the producers behind the download buttons (file name -> callable).
DOWNLOADS = "lv_download_files"
_MIME = {".fits": "application/fits", ".ecsv": "text/plain", ".csv": "text/csv",
         ".vot": "application/x-votable+xml", ".png": "image/png", ".pdf": "application/pdf",
         ".json": "application/json"}


def _written(name, writer):
    """Bytes of a file written by ``writer(path)`` into a temporary folder."""
    with tempfile.TemporaryDirectory(prefix="lensview-") as folder:
        path = Path(folder) / name
        writer(path)
        return path.read_bytes()


def knot_table(state, links=()):
    """The knots as a Table (ra, dec, label, pair_id), pairs numbered from 0."""
    marks = page_state.candidates(state)
    pair_id = np.full(len(marks), -1, dtype=np.int64)
    for number, (i, j) in enumerate(links):
        pair_id[[i, j]] = number
    return Table({"ra": [m["ra"] for m in marks], "dec": [m["dec"] for m in marks],
                  "label": [m["label"] for m in marks], "pair_id": pair_id})


def session_document(knots, scene, z_source, settings):
    """The session file's JSON text for the inputs, settings and knots (a `knot_table`)."""
    from ..io import save_session

    record = {
        "z_lens": scene.z_lens, "z_source": float(z_source), "cutout": scene.cutout_file,
        "models": list(scene.model_inputs), "cosmology": scene.cosmology,
        "display": {"stretch": settings["stretch"], "colormap": settings["cmap"],
                    "limits": settings["limits"]},
        "candidates": knots,
    }
    return save_session(None, record)


def download_producers(state, scene, z_source, results, settings, viewport, *,
                       region_suffix=".fits", table_suffix=".ecsv", figure_suffix=".png",
                       table_choice="per model", include_caustics=False):
    """File name -> (callable returning the bytes, mime type) for every download.

    Everything a producer needs is gathered now: the callables run later, on
    another thread, when a button is pressed, where the session state is out
    of reach.
    """
    from ..io import write_regions, write_table
    from ..figures import render_field_figure, save_figure

    knots = knot_table(state, results.links)
    stem = "lensview_" + ("demo" if scene.key.startswith("demo") else "field")
    curves = list(results.curves)
    if include_caustics:
        for field in scene.fields:
            curves += list(field.caustics(z_source))

    def regions():
        return _written(f"regions{region_suffix}", lambda p: write_regions(
            p, curves, knots if len(knots) else None, wcs=scene.cutout.wcs))

    tables = {"per model": results.table, "spread": results.spread, "pairs": results.pairs,
              "counter-images": results.counterimages}

    def table():
        chosen = tables.get(table_choice)
        if chosen is None:
            raise LensviewInputError(f"There is no {table_choice} table yet; mark knots first.")
        return _written(f"table{table_suffix}",
                        lambda p: write_table(chosen, p, cosmology=scene.cosmology))

    def figure():
        rows, cols = viewport.slices
        pairs = None
        if results.links:
            pairs = Table({"i": [i for i, _ in results.links], "j": [j for _, j in results.links]})
        fig = render_field_figure(
            scene.cutout.data[rows, cols], scene.cutout.wcs[rows, cols], curves=results.curves,
            candidates=knots if len(knots) else None, pairs=pairs if len(knots) else None,
            counterimages=_other_images(results.counterimages), z_lens=scene.z_lens,
            cosmology=scene.cosmology, stretch=settings["stretch"], limits=settings["limits"],
            cmap=settings["cmap"])
        return _written(f"figure{figure_suffix}", lambda p: save_figure(fig, p, dpi=200))

    def session():
        return session_document(knots, scene, z_source, settings).encode("utf-8")

    label = table_choice.replace(" ", "_").replace("-", "")
    return {
        f"{stem}_regions{region_suffix}": (regions, _MIME[region_suffix]),
        f"{stem}_{label}{table_suffix}": (table, _MIME[table_suffix]),
        f"{stem}_figure{figure_suffix}": (figure, _MIME[figure_suffix]),
        f"{stem}_session.json": (session, _MIME[".json"]),
    }


def table_unavailable(results, table_choice):
    """Why the chosen table cannot be downloaded yet, or None when it can.

    A download is a valid file of its kind or is not offered: the button is
    disabled with this reason instead of writing a file that holds an error.
    """
    if table_choice in ("per model", "spread") and (
            results.table is None or (table_choice == "spread" and results.spread is None)):
        return "Mark at least one knot on the picture: the measurement tables list the knots."
    if table_choice == "pairs" and results.pairs is None:
        return "Pairs need at least two marked knots; mark more knots on the picture."
    if table_choice == "counter-images" and results.counterimages is None:
        return ("Counter-images are predicted for a marked knot; mark one on the picture "
                "(tab Counter-images and pairs chooses which).")
    return None


def _other_images(images):
    if images is None or not len(images):
        return None
    others = images[~images["is_input"]]
    return others if len(others) else None


def takeaway_panel(state, scene, z_source, results, settings, viewport):
    st.markdown("**Download**")
    cols = st.columns(4)
    region_format = cols[0].selectbox("Region list", list(REGION_FORMATS), key="lv_region_format")
    include_caustics = cols[0].checkbox("with caustics", key="lv_region_caustics")
    table_choice = cols[1].selectbox("Table", ["per model", "spread", "pairs", "counter-images"],
                                     key="lv_table_choice")
    table_format = cols[1].selectbox("Table format", list(TABLE_FORMATS), key="lv_table_format")
    figure_format = cols[2].selectbox("Figure of the shown crop", list(FIGURE_FORMATS),
                                      key="lv_figure_format")
    cols[3].markdown("Session file (JSON): inputs' names and checksums, redshifts, cosmology, "
                     "display and knots.")
    producers = download_producers(
        state, scene, z_source, results, settings, viewport,
        region_suffix=REGION_FORMATS[region_format], table_suffix=TABLE_FORMATS[table_format],
        figure_suffix=FIGURE_FORMATS[figure_format], table_choice=table_choice,
        include_caustics=include_caustics)
    state[DOWNLOADS] = {name: produce for name, (produce, _) in producers.items()}
    labels = ("Download regions", "Download table", "Download figure", "Download session")
    missing = {"Download table": table_unavailable(results, table_choice)}
    if not results.curves and not page_state.candidates(state):
        missing["Download regions"] = ("No critical curve at this source redshift and no knot "
                                       "marked: there is nothing to list yet.")
    for column, label, (name, (produce, mime)) in zip(cols, labels, producers.items()):
        blocked = missing.get(label)
        column.download_button(label, data=_safe(produce), file_name=name, mime=mime,
                               key=f"lv_dl_{label.split()[-1]}", on_click="ignore",
                               disabled=blocked is not None, help=blocked)
        if blocked:
            column.caption(blocked)
    st.divider()
    st.markdown("**Restore**")
    left, right = st.columns(2)
    with left:
        limit = f"Up to {upload_limit_mb()} MB per file."
        st.file_uploader("Session file (.json)", type=["json"], key="lv_up_session", help=limit)
        st.button("Restore this session", key="lv_restore", on_click=_restore_session,
                  args=(state, scene))
    with right:
        st.file_uploader("Knot list: region file or catalogue with RA/Dec",
                         type=["csv", "ecsv", "vot", "xml", "fits"], key="lv_up_catalogue",
                         help=limit)
        a, b = st.columns(2)
        a.button("Add to my knots", key="lv_cat_add", on_click=_load_catalogue,
                 args=(state, scene, True))
        b.button("Replace my knots", key="lv_cat_replace", on_click=_load_catalogue,
                 args=(state, scene, False))
    for key, show in (("lv_restore_error", st.error), ("lv_restore_note", st.success)):
        message = state.pop(key, None)
        if message:
            show(message)


def _safe(produce):
    """The producer, with input errors turned into a short text file that says what went wrong."""
    def run():
        try:
            return produce()
        except LensviewInputError as error:
            return f"lensview could not write this file: {error}\n".encode("utf-8")
    return run


def _load_catalogue(state, scene, append):
    from ..io import read_candidates

    upload = state.get("lv_up_catalogue")
    if upload is None:
        state["lv_restore_error"] = "Choose a knot list first (CSV, ECSV, VOTable or FITS)."
        return
    try:
        table = read_candidates(upload, wcs=scene.cutout.wcs)
    except (LensviewInputError, OSError, ValueError) as error:
        state["lv_restore_error"] = str(error)
        return
    page_state.replace_candidates(state, table, append=append)
    state["lv_restore_note"] = f"Read {len(table)} knot(s) from {upload.name}."


def _restore_session(state, scene):
    from ..io import check_session_files, load_session

    upload = state.get("lv_up_session")
    if upload is None:
        state["lv_restore_error"] = "Choose a session file first."
        return
    try:
        session = load_session(upload.getvalue())
    except (LensviewInputError, OSError, ValueError) as error:
        state["lv_restore_error"] = str(error)
        return
    problems = [s for s in check_session_files(session, scene.files) if not s.ok]
    if problems:
        state["lv_restore_error"] = (
            "The session was saved with other inputs than the ones loaded now: "
            + "; ".join(str(p) for p in problems)
            + ". Load the same files (sidebar) and restore again; nothing was changed.")
        return
    lens_key = "lv_z_lens_demo" if scene.key.startswith("demo") else "lv_z_lens_files"
    state[lens_key] = float(session.z_lens)
    state["lv_z_source"] = float(session.z_source)
    _restore_cosmology(state, session.cosmology)
    _restore_display(state, session.display)
    page_state.replace_candidates(state, session.candidate_table())
    state["lv_restore_note"] = (f"Restored {len(session.candidates)} knot(s), the redshifts, the "
                                "cosmology and the display settings.")


def _restore_cosmology(state, record):
    from .inputs import FLAT, PLANCK

    if record.get("name") == "Planck18":
        state["lv_cosmology"] = PLANCK
    elif "H0" in record:
        state["lv_cosmology"] = FLAT
        state["lv_h0"], state["lv_om0"] = float(record["H0"]), float(record["Om0"])


def _restore_display(state, display):
    from .sky import COLOUR_MAPS, STRETCH_CHOICES

    if display.get("stretch") in STRETCH_CHOICES:
        state["lv_stretch"] = display["stretch"]
    if display.get("colormap") in COLOUR_MAPS:
        state["lv_cmap"] = display["colormap"]
    for name, value in LIMIT_CHOICES.items():
        if value == display.get("limits"):
            state["lv_limits"] = name

