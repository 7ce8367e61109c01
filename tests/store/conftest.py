"""Store fixtures: a fresh SQLite store with one image of 2 x 3 tiles."""

import pytest

from labeler.imagery.tiling import tile_grid
from labeler.store import NewImage, Store


def make_store(path, *, overlap_share=0.0):
    store = Store(f"sqlite:///{path}", create=True)
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
def store(tmp_path):
    s = make_store(tmp_path / "labeler.db")
    yield s
    s.close()
