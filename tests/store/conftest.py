"""Store fixtures: a fresh store with one image of 2 x 3 tiles, on each backend."""

import pytest

from labeler.imagery.tiling import tile_grid
from labeler.store import NewImage, Store


def make_store(where, *, overlap_share=0.0):
    """A new store at ``where`` (a database URL, or the path of a SQLite file)."""
    url = str(where) if "://" in str(where) else f"sqlite:///{where}"
    store = Store(url, create=True)
    store.add_image(
        NewImage(
            name="plot-a",
            path="images/plot-a.tif",
            sha256="a" * 64,
            width=500,
            height=300,
            bands=3,
            dtype="uint8",
        ),
        tile_grid(300, 500, size=256, overlap=32),
        overlap_share=overlap_share,
    )
    return store


@pytest.fixture
def store(store_url):
    s = make_store(store_url)
    yield s
    s.close()
