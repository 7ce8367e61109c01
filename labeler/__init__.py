"""labeler: pixel masks of crop, weed and disease symptom regions from field imagery.

The package is laid out one room per concern (see README): ``masks``, ``picker`` and
``agreement`` are pure numpy; ``store`` holds all SQL; ``imagery`` and ``export`` all
image and GeoJSON files; ``model`` all torch; ``tui`` all textual; ``editor`` the OpenCV
mask editor.
"""

__all__ = ["__version__"]

__version__ = "0.1.0"
