"""Benchmark: server time from a click on the picture to the updated measurement table.

The page (`app.py`) runs on the demo field under `streamlit.testing.v1.AppTest`,
which executes the script exactly as the server does. Each click is the value
the click component hands over (display pixels of a demo knot, a new time
stamp); the time is one rerun of the script: handling the click, measuring
every knot against every model, pairing, counter-images of the new knot,
drawing the marks and encoding the picture, and all the tables. The plain
reference is the same click with every cache emptied first, so the demo is
read again and each model's derivative terms and curves are recomputed from
scratch, as a page without caches would do. Both are measured in this run.
"""

import statistics
import sys
import time
from pathlib import Path

import astropy.units as u
from astropy.coordinates import SkyCoord

ROOT = Path(__file__).resolve().parents[1]
APP = ROOT / "app.py"
CLICKS = 8
TARGET_SECONDS = 0.3


def _app():
    from streamlit.testing.v1 import AppTest

    app = AppTest.from_file(str(APP), default_timeout=300)
    app.run()
    if app.exception:
        raise RuntimeError(f"the page failed on the demo: {app.exception[0].message}")
    return app


def _demo_knot_clicks(app):
    """Click values (display pixels) on the demo's own knots, as the component reports them."""
    from lensview.page.inputs import demo_scene

    viewport = app.session_state["lv_viewport"]
    scene = demo_scene()
    clicks = []
    for ra, dec in zip(scene.knots["ra"], scene.knots["dec"]):
        x, y = scene.cutout.wcs.world_to_pixel(SkyCoord(ra, dec, unit=u.deg))
        u_display, v_display = viewport.cutout_to_display(float(x), float(y))
        clicks.append({"x": round(u_display), "y": round(v_display), "width": viewport.width,
                       "height": viewport.height})
    return clicks


def _timed_clicks(app, clicks, n, *, from_scratch, stamp):
    import streamlit as st

    times = []
    app.session_state["lv_candidates"] = []
    for k in range(n):
        click = dict(clicks[k % len(clicks)], unix_time=stamp + k)
        app.session_state["lv_click"] = click
        if from_scratch:
            st.cache_resource.clear()
        start = time.perf_counter()
        app.run()
        times.append(time.perf_counter() - start)
        if app.exception or not len(app.table):
            raise RuntimeError("the click did not produce a measurement table")
    return times


def _measure_alone(app, n):
    """Median time of the library's measurement of the knots the clicks marked."""
    from lensview.measure import measure_candidates
    from lensview.page.state import candidate_coords

    scene = app.session_state["lv_scene"]
    coords = candidate_coords({"lv_candidates": app.session_state["lv_candidates"]})
    times = []
    for _ in range(n):
        start = time.perf_counter()
        measure_candidates(coords, scene.fields, scene.z_source, cosmology=scene.cosmology)
        times.append(time.perf_counter() - start)
    return statistics.median(times)


def main():
    app = _app()
    clicks = _demo_knot_clicks(app)
    _timed_clicks(app, clicks, 2, from_scratch=False, stamp=1)          # warm-up
    cached = _timed_clicks(app, clicks, CLICKS, from_scratch=False, stamp=100)
    scratch = _timed_clicks(app, clicks, max(3, CLICKS // 2), from_scratch=True, stamp=1000)
    median, reference = statistics.median(cached), statistics.median(scratch)
    library = _measure_alone(app, CLICKS)
    print(f"click -> updated table on the demo (server rerun): median {median * 1e3:.0f} ms "
          f"over {len(cached)} clicks (target < {TARGET_SECONDS * 1e3:.0f} ms: "
          f"{'met' if median < TARGET_SECONDS else 'NOT met'})")
    print(f"plain reference, every cache emptied before the click: median "
          f"{reference * 1e3:.0f} ms over {len(scratch)} clicks")
    print(f"ratio reference / lensview: {reference / median:.1f}")
    print(f"of a click, measure_candidates alone (library, same knots and models): median "
          f"{library * 1e3:.0f} ms")
    return median, reference


if __name__ == "__main__":
    sys.exit(0 if main()[0] < TARGET_SECONDS else 1)
