"""What the page remembers between reruns: the marked knots and the last click.

Every function takes the session state as a plain mapping (``st.session_state``
in the page, a dict in unit tests), so the same code runs behind a real click,
an AppTest and a benchmark. The knots live only here; a failed upload or a
rerun never touches them.
"""

import numpy as np
import astropy.units as u
from astropy.coordinates import SkyCoord

from ..errors import LensviewInputError

__all__ = [
    "CANDIDATES",
    "VIEWPORT",
    "init_state",
    "candidates",
    "candidate_coords",
    "candidate_labels",
    "next_label",
    "add_candidate",
    "add_candidate_from_display_click",
    "handle_click",
    "remove_candidates",
    "relabel_candidates",
    "replace_candidates",
]

#: Session-state key of the list of marked knots (dicts with label, ra, dec, snapped).
CANDIDATES = "lv_candidates"
#: Session-state key of the `Viewport` the last picture was drawn with.
VIEWPORT = "lv_viewport"
#: Session-state key of the scene (inputs) the last picture showed.
VIEWPORT_SCENE = "lv_viewport_scene"
#: Session-state key of the time stamp of the last click already handled.
LAST_CLICK = "lv_last_click"
#: Session-state key of the note about the last click (snapped or not, off the picture).
CLICK_NOTE = "lv_click_note"


def init_state(state):
    """Create the page's keys once per browser session."""
    state.setdefault(CANDIDATES, [])
    state.setdefault(LAST_CLICK, None)
    state.setdefault(CLICK_NOTE, "")


def candidates(state):
    """The marked knots, in marking order (list of dicts)."""
    return state.setdefault(CANDIDATES, [])


def candidate_coords(state):
    """Sky positions of the marked knots (`~astropy.coordinates.SkyCoord`, ICRS, 1-D)."""
    marks = candidates(state)
    return SkyCoord([m["ra"] for m in marks] * u.deg, [m["dec"] for m in marks] * u.deg,
                    frame="icrs")


def candidate_labels(state):
    return [m["label"] for m in candidates(state)]


def next_label(state):
    """The first free label of the form K1, K2, ..."""
    taken = set(candidate_labels(state))
    number = 1
    while f"K{number}" in taken:
        number += 1
    return f"K{number}"


def add_candidate(state, coord, label=None, *, snapped=False):
    """Append a knot; an empty or already used label gets the next free one.

    Returns
    -------
    dict
        The stored knot.
    """
    coord = SkyCoord(coord).icrs
    label = _clean_label(label)
    if not label or label in candidate_labels(state):
        label = next_label(state)
    mark = {"label": label, "ra": float(coord.ra.deg), "dec": float(coord.dec.deg),
            "snapped": bool(snapped)}
    candidates(state).append(mark)
    return mark


def add_candidate_from_display_click(state, u_display, v_display, *, cutout, viewport=None,
                                     snap_radius=None, label=None):
    """Mark a knot where the picture was clicked.

    Display position -> cutout pixel (`Viewport.display_to_cutout`) -> sky
    (the cutout's WCS); optionally moved to the centroid of the nearby peak
    (`lensview.photometry.snap_to_centroid`).

    Parameters
    ----------
    state : mapping
    u_display, v_display : float
        Display coordinates on the picture (see `click_display_position`).
    cutout : `~lensview.io.fits.Cutout`
        The image the picture shows.
    viewport : Viewport, optional
        The picture's viewport; default the one stored by the last drawing.
    snap_radius : `~astropy.units.Quantity`, optional
        Snap to a centroid within this radius; None leaves the click as is.
    label : str, optional
        The knot's label; default the next free "K<n>".

    Returns
    -------
    dict or None
        The new knot, or None when the click fell off the picture.
    """
    viewport = viewport if viewport is not None else state.get(VIEWPORT)
    if viewport is None or not viewport.contains_display(u_display, v_display):
        state[CLICK_NOTE] = "The click fell outside the picture; nothing was marked."
        return None
    x, y = viewport.display_to_cutout(u_display, v_display)
    coord = cutout.wcs.pixel_to_world(x, y)
    snapped = False
    note = ""
    if snap_radius is not None:
        from ..photometry import snap_to_centroid

        result = snap_to_centroid(cutout.data, cutout.wcs, coord, snap_radius)
        coord, snapped = result.coord, bool(result.moved)
        note = "" if snapped else f"Kept the clicked position ({result.reason})."
    mark = add_candidate(state, coord, label, snapped=snapped)
    state[CLICK_NOTE] = note or (f"Marked {mark['label']}"
                                 + (" at the centroid of the nearby peak." if snapped else "."))
    return mark


def handle_click(state, value, *, cutout, scene_key, snap_radius=None, label=None):
    """Act once on a value of the click component.

    The component keeps returning its last click on every rerun; a click is
    new when its time stamp differs from the last one handled, and it counts
    only if it was made on the picture of the current scene.

    Returns
    -------
    dict or None
        The new knot, if the click marked one.
    """
    from .viewport import click_display_position

    if not value or value.get("unix_time") == state.get(LAST_CLICK):
        return None
    state[LAST_CLICK] = value.get("unix_time")
    viewport = state.get(VIEWPORT)
    if viewport is None or state.get(VIEWPORT_SCENE) != scene_key:
        return None
    u_display, v_display = click_display_position(value, viewport)
    return add_candidate_from_display_click(state, u_display, v_display, cutout=cutout,
                                            viewport=viewport, snap_radius=snap_radius,
                                            label=label)


def remove_candidates(state, indices):
    """Drop the knots at the given positions."""
    drop = {int(i) for i in indices}
    state[CANDIDATES] = [m for k, m in enumerate(candidates(state)) if k not in drop]


def relabel_candidates(state, labels):
    """Give the knots new labels (one per knot, in order).

    Raises
    ------
    LensviewInputError
        If a label is empty or used twice; the knots are then left unchanged.
    """
    labels = [_clean_label(label) for label in labels]
    marks = candidates(state)
    if len(labels) != len(marks):
        raise LensviewInputError(
            f"{len(labels)} labels for {len(marks)} knots; give one label per knot.")
    if not all(labels):
        raise LensviewInputError("A knot label is empty; give every knot a label.")
    repeated = sorted({label for label in labels if labels.count(label) > 1})
    if repeated:
        raise LensviewInputError(
            f"The label(s) {', '.join(repeated)} are used twice; give every knot its own label.")
    for mark, label in zip(marks, labels):
        mark["label"] = label


def replace_candidates(state, table, *, append=False):
    """Take knots from a table with ``ra``, ``dec`` (deg) and ``label`` columns.

    Used for re-uploaded catalogues and sessions; the current knots are kept
    when ``append`` is true, and repeated labels get the next free label.
    """
    if not append:
        state[CANDIDATES] = []
    ra = np.asarray(table["ra"], float)
    dec = np.asarray(table["dec"], float)
    labels = [str(v) for v in table["label"]] if "label" in table.colnames else [None] * len(ra)
    for r, d, label in zip(ra, dec, labels):
        add_candidate(state, SkyCoord(r * u.deg, d * u.deg), label)


def _clean_label(label):
    return "" if label is None else str(label).strip()
