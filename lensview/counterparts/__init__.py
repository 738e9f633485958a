"""Counter-images of a marked knot (`images`), mirrored pairs among knots
(`pairing`), and the source-plane view of a cutout (`source_plane`)."""

from .images import predict_counterimages
from .pairing import DEFAULT_MAX_SCORE, DEFAULT_TOLERANCE, pair_counterparts
from .source_plane import source_plane_image

__all__ = ["DEFAULT_MAX_SCORE", "DEFAULT_TOLERANCE", "predict_counterimages", "pair_counterparts", "source_plane_image"]
