"""lensview: critical curves, magnifications and mirrored images of compact
knots in lensed arcs behind galaxy clusters.

The public API is re-exported here and imported on first use, so that
``import lensview`` stays quick for the command line.
"""

from importlib import import_module

__version__ = "0.1.0"

_EXPORTS = {
    "DeflectionField": "lens",
    "load_model": "lens",
    "Curve": "lens",
    "CurveSet": "lens",
    "LensviewInputError": "errors",
    "OutsideFootprintWarning": "errors",
    "MissingMassWarning": "errors",
    "arrival_times": "lens",
    "time_delay_scale": "lens",
    "read_cutout": "io",
    "read_deflection": "io",
    "measure_candidates": "measure",
    "summarize_models": "measure",
    "pair_counterparts": "counterparts",
    "predict_counterimages": "counterparts",
    "source_plane_image": "counterparts",
    "measure_ensemble": "ensemble",
    "summarize_ensemble": "ensemble",
    "find_realisations": "ensemble",
    "write_regions": "io",
    "read_candidates": "io",
    "write_table": "io",
    "save_session": "io",
    "load_session": "io",
    "read_table": "io",
    "vertex_table": "io",
    "Band": "photometry",
    "BandImage": "photometry",
    "band_image": "photometry",
    "band_from_header": "photometry",
    "ab_colours": "photometry",
    "measure_filters": "photometry",
    "Dust": "sed",
    "fit_blackbody": "sed",
    "planck_nu": "sed",
    "knot_nature": "nature",
}

__all__ = sorted(_EXPORTS) + ["__version__"]


def __getattr__(name):
    if name in _EXPORTS:
        value = getattr(import_module(f".{_EXPORTS[name]}", __name__), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'lensview' has no attribute {name!r}")


def __dir__():
    return __all__
