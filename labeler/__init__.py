"""labeler: pixel masks of crop, weed and disease symptom regions from field imagery.

The package is laid out one room per concern, in layers (docs/architecture.md; the rules
are import contracts in pyproject.toml): ``picker``, ``agreement`` and ``metrics`` are
numpy only and ``masks`` works without I/O; ``store`` holds all SQL; ``imagery`` and
``export`` all image and GeoJSON files; ``model`` all torch; ``tui`` all textual;
``editor`` the mask editor, whose ``window`` alone opens OpenCV windows; ``workflow``
decides every tile state.
"""

__all__ = ["__version__"]

__version__ = "0.1.0"
