"""A small project with one image of 2 x 3 tiles and a fake proposer (no model), on each
store backend (``project_store``)."""

import numpy as np
import pytest
from affine import Affine

from labeler.imagery.write import write_geotiff
from labeler.project import init_project, open_project, team_settings
from labeler.settings import load_settings
from labeler.store import NewProposal
from labeler.workflow import add_images


def fake_proposals(project, *, seed=0, with_uncertainty=True):
    """Store seeded proposals: random masks, embeddings and uncertainty scalars."""
    rng = np.random.default_rng(seed)
    store = project.store
    mv = store.add_model_version(kind="head" if with_uncertainty else "cold_start", name="fake")
    items = []
    for t in store.tiles():
        mask = rng.integers(0, 4, t.shape).astype(np.uint8)
        fr = np.bincount(mask.ravel(), minlength=4) / mask.size
        items.append(
            NewProposal(
                t.id,
                mask,
                embedding=rng.normal(size=16).astype(np.float32),
                mean_entropy=float(rng.random()) if with_uncertainty else None,
                mean_margin=float(rng.random()) if with_uncertainty else None,
                mean_least_confidence=float(rng.random()) if with_uncertainty else None,
                mean_bald=float(rng.random()) if with_uncertainty else None,
                class_fractions=fr.tolist(),
            )
        )
    store.add_proposals(mv.id, items)
    return mv


def _small_project(tmp_path, settings_text=None):
    """One invented 300 x 500 GeoTIFF (random pixels) in a new project, 2 x 3 tiles."""
    rgb = np.random.default_rng(2).integers(0, 256, (300, 500, 3), dtype=np.uint8)
    write_geotiff(
        tmp_path / "east-block.tif",
        rgb,
        transform=Affine(0.004, 0, 431000, 0, -0.004, 5712000),
        crs="EPSG:32631",
    )
    root = tmp_path / "proj"
    init_project(root).close()
    if settings_text is not None:
        (root / "labeler.toml").write_text(settings_text)
        with open_project(root) as p:  # on a server the team's settings live in the database
            p.store.set_team_settings(team_settings(load_settings(root)))
    p = open_project(root)
    add_images(p, [tmp_path / "east-block.tif"])
    return p


@pytest.fixture
def project(tmp_path, project_store):
    p = _small_project(tmp_path)
    yield p
    p.close()


@pytest.fixture
def overlap_project(tmp_path, project_store):
    """Every tile is an overlap tile; agreement threshold 0.6."""
    p = _small_project(tmp_path, "[agreement]\noverlap_share = 1.0\nthreshold = 0.6\n")
    yield p
    p.close()


def adapted_encoder_version(project, *, seed: int = 3):
    """An adapted encoder version stored in ``project``: the ImageNet weights with seeded
    small changes (common practice, no source: a stand-in for ``labeler adapt``'s output).
    Returns its model version record."""
    import torch

    from labeler.model.adapted import trainable_encoder
    from labeler.workflow.encoders import save_encoder_version

    base = trainable_encoder()
    generator = torch.Generator().manual_seed(seed)
    state = {
        k: v + 0.05 * v.std() * torch.randn(v.shape, generator=generator)
        if v.is_floating_point() and v.numel() > 1 and "running_var" not in k
        else v
        for k, v in base.state_dict().items()
    }
    return save_encoder_version(
        project, state, base_version=base.version, root_version=base.version, details={}
    )

