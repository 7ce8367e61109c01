"""Proposals on a Dask cluster are the local proposals, whatever happens to the workers.

The oracle is the local path (``labeler.workflow.propose`` without a cluster): a
``LocalCluster`` of two worker processes on 127.0.0.1 must store the same masks (same PNG
bytes), uncertainty maps, embeddings and scalars for every tile, for the cold start and
for a (tiny, untrained) head. Workers are stopped and failed by marker files, never by
timing. Common practice, no source.
"""

from __future__ import annotations

import io
import os
import socket
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pytest
from affine import Affine

from labeler.cli import main
from labeler.errors import LabelerError
from labeler.imagery.write import write_geotiff
from labeler.project import init_project, open_project
from labeler.store import NewProposal
from labeler.workflow import add_images, pick_tiles, propose

distributed = pytest.importorskip(
    "distributed", reason="the cluster tests need the cluster extra: pip install 'labeler[cluster]'"
)

import labeler.workflow.cluster as cluster_module  # noqa: E402
from labeler.workflow.cluster import propose_on_cluster, run_propose_chunk  # noqa: E402

IMAGES = ("north-strip", "mill-corner", "long-acre")
#: 64-pixel tiles of 120 x 176 images: 2 x 3 tiles per image, one chunk per image.
TILES_PER_IMAGE = 6


@pytest.fixture(scope="module")
def images(tmp_path_factory) -> list[Path]:
    """Three invented GeoTIFFs: seeded noise with green crop-like stripes."""
    folder = tmp_path_factory.mktemp("images")
    rng = np.random.default_rng(19)
    paths = []
    for i, name in enumerate(IMAGES):
        rgb = rng.integers(40, 120, (120, 176, 3), dtype=np.uint8)
        stripes = (np.arange(176) + 7 * i) % 30 < 9
        rgb[:, stripes, 1] += 100
        path = folder / f"{name}.tif"
        write_geotiff(
            path,
            rgb,
            transform=Affine(0.005, 0, 431000 + 10 * i, 0, -0.005, 5712000),
            crs="EPSG:32631",
        )
        paths.append(path)
    return paths


@pytest.fixture(scope="module")
def cluster():
    """Two worker processes, one task thread each, on 127.0.0.1; closed after the module."""
    with distributed.LocalCluster(
        n_workers=2,
        threads_per_worker=1,
        processes=True,
        host="127.0.0.1",
        dashboard_address=None,
    ) as local:
        yield local.scheduler_address


def make_project(root: Path, images: list[Path], *, cache: Path, worker_threads: int = 1):
    """A project of the three images with 64-pixel tiles and 2 MC-dropout passes."""
    init_project(root).close()
    cache.mkdir(parents=True, exist_ok=True)
    (root / "labeler.toml").write_text(
        textwrap.dedent(
            f"""\
            [tiles]
            size = 64
            overlap = 8
            [model]
            mc_samples = 2
            threads = 1
            [cluster]
            worker_threads = {worker_threads}
            worker_cache = "{cache.as_posix()}"
            connect_timeout = 60
            """
        )
    )
    project = open_project(root)
    add_images(project, images)
    assert len(project.store.tiles()) == TILES_PER_IMAGE * len(images)
    return project


def add_tiny_head(project) -> None:
    """A seeded, untrained head with refinement, stored as the newest model version."""
    import torch

    from labeler.model.checkpoint import save_checkpoint
    from labeler.model.encoder import encoder_version, load_encoder
    from labeler.model.head import HeadConfig, ProposalHead

    torch.manual_seed(5)
    head = ProposalHead(HeadConfig(width=8, refine_channels=4)).eval()
    version = load_encoder().version
    assert encoder_version() == version  # what the client sends without loading the encoder
    save_checkpoint(
        project.root / "models" / "tiny.pt", head, encoder_version=version, val_iou=[0.5] * 4
    )
    project.store.add_model_version(
        kind="head", name="tiny", encoder_version=version, checkpoint="models/tiny.pt"
    )


def stored(project) -> dict[tuple[str, int, int], tuple]:
    """Every tile's newest proposal, keyed by image name and tile position."""
    names = {im.id: im.name for im in project.store.images()}
    out = {}
    for t in project.store.tiles():
        p = project.store.latest_proposal(t.id)  # with the uncertainty maps
        out[(names[t.image_id], t.row, t.col)] = (
            p.mask_png,
            p.uncertainty_npy,
            p.embedding_npy,
            p.mean_entropy,
            p.mean_margin,
            p.mean_bald,
            p.mean_least_confidence,
            tuple(p.class_fractions),
            t.state,
        )
    return out


@pytest.fixture(scope="module")
def reference(tmp_path_factory, images):
    """The local path's proposals: cold start, then the tiny head."""
    root = tmp_path_factory.mktemp("reference")
    project = make_project(root / "proj", images, cache=root / "cache")
    try:
        propose(project)
        cold = stored(project)
        add_tiny_head(project)
        result = propose(project)
        assert result.mode == "head" and result.proposed == len(cold)
        yield cold, stored(project)
    finally:
        project.close()


def same_as(got: dict, want: dict) -> None:
    assert got.keys() == want.keys()
    for key, values in want.items():
        assert got[key] == values, key  # bytes and floats exactly


def test_cold_start_and_head_on_the_cluster_equal_the_local_path(
    tmp_path, images, cluster, reference, monkeypatch
):
    cold, headed = reference
    project = make_project(tmp_path / "proj", images, cache=tmp_path / "cache")
    monkeypatch.setattr(cluster_module, "WRITE_BATCH_TILES", 1)  # write each chunk on arrival
    try:
        seen = []

        def progress(done, total, label):
            seen.append((done, total, len(project.store.latest_proposals())))

        result = propose(project, cluster=cluster, progress=progress)
        assert (result.mode, result.proposed, result.up_to_date) == ("cold_start", 18, 0)
        assert result.cache_misses == 18
        assert seen[-1] == (18, 18, 18) and all(t == 18 for _, t, _ in seen)
        assert [d for d, _, _ in seen] == sorted(d for d, _, _ in seen)
        assert all(stored_now == d for d, _, stored_now in seen)  # stored as they arrive
        same_as(stored(project), cold)
        assert all(v[1] is None and v[3] is None for v in cold.values())  # no uncertainty

        again = propose(project, cluster=cluster)
        assert (again.proposed, again.up_to_date) == (0, 18)

        add_tiny_head(project)
        result = propose(project, cluster=cluster)
        assert (result.mode, result.proposed) == ("head", 18)
        assert result.cache_hits == 18  # the workers' own cache, filled by the cold start
        same_as(stored(project), headed)
        assert all(v[1] is not None and v[3] is not None for v in headed.values())
    finally:
        project.close()


def dies_once(chunk):
    """Kill this worker process the first time any chunk gets here; then work normally."""
    marker = Path(chunk.cache_folder) / "worker-killed"
    try:
        fd = os.open(marker, os.O_CREAT | os.O_EXCL | os.O_WRONLY)
    except FileExistsError:
        return run_propose_chunk(chunk)
    os.close(fd)
    os._exit(17)


def test_a_killed_worker_loses_no_tile(tmp_path, images, cluster, reference):
    cold, _ = reference
    project = make_project(tmp_path / "proj", images, cache=tmp_path / "cache")
    try:
        result = propose_on_cluster(project, address=cluster, task=dies_once)
        assert (tmp_path / "cache" / "worker-killed").is_file()  # a worker did die
        assert result.proposed == 18
        same_as(stored(project), cold)
    finally:
        project.close()


def fails_on_mill_corner(chunk):
    if chunk.image.name.startswith("mill-corner"):
        raise LabelerError("mill-corner.tif: read error on the test's broken disk")
    return run_propose_chunk(chunk)


def test_a_failed_chunk_keeps_the_others_and_a_rerun_does_the_rest(
    tmp_path, images, cluster, reference
):
    cold, _ = reference
    project = make_project(tmp_path / "proj", images, cache=tmp_path / "cache")
    try:
        with pytest.raises(
            LabelerError,
            match=r"image 'mill-corner.*failed on the cluster \(mill-corner.tif: read error on "
            r"the test's broken disk\); the 12 tiles that finished are stored",
        ):
            propose_on_cluster(project, address=cluster, task=fails_on_mill_corner)
        states = {t.state for t in project.store.tiles() if t.image_id == 2}
        assert states == {"unseen"}
        assert len(project.store.latest_proposals()) == 12
        rerun = propose(project, cluster=cluster)
        assert (rerun.proposed, rerun.up_to_date) == (6, 12)
        same_as(stored(project), cold)
    finally:
        project.close()


def test_pick_on_the_cluster_embeds_the_tiles_without_a_proposal_first(
    tmp_path, images, cluster, reference
):
    cold, _ = reference
    # worker_threads 0: each worker shares its machine's cores among its task threads
    project = make_project(
        tmp_path / "proj", images[:2], cache=tmp_path / "cache", worker_threads=0
    )
    try:
        propose(project)  # here, without a cluster
        add_images(project, images[2:])  # six tiles without a proposal
        result = pick_tiles(project, k=4, cluster=cluster)
        assert result.without_proposal == 0 and len(result.items) == 18
        assert result.strategy == "coreset"  # cold-start proposals carry no uncertainty
        got = stored(project)
        assert got.keys() == cold.keys()
        for key, want in cold.items():
            assert got[key][0] == want[0], key  # the cold-start mask: pixels only, exact
            assert got[key][7:] == want[7:], key  # class fractions and state
            # 2 torch threads per task here, 1 in the reference: the encoder's sums run in
            # another order, so the embeddings agree to float16 rounding, not bit for bit
            np.testing.assert_allclose(
                np.load(io.BytesIO(got[key][2])), np.load(io.BytesIO(want[2])), rtol=0, atol=2e-2
            )
    finally:
        project.close()


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def test_an_unreachable_scheduler_is_one_clear_line(tmp_path, images, capsys, monkeypatch):
    project = make_project(tmp_path / "proj", images[:1], cache=tmp_path / "cache")
    project.close()
    monkeypatch.setenv("LABELER_CLUSTER_CONNECT_TIMEOUT", "0.5")
    address = f"tcp://127.0.0.1:{free_port()}"
    assert main(["propose", str(tmp_path / "proj"), "--cluster", address]) == 1
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1
    assert f"cluster '{address}': no Dask scheduler answered within 0.5 s" in err
    assert "dask scheduler" in err
    with open_project(tmp_path / "proj") as project:
        assert project.store.latest_proposals() == {}
        with pytest.raises(LabelerError, match=r"cluster 'nonsense::x': not a scheduler address"):
            propose(project, cluster="nonsense::x")


def test_without_a_cluster_dask_is_never_imported(tmp_path, images):
    make_project(tmp_path / "proj", images[:1], cache=tmp_path / "cache").close()
    code = textwrap.dedent(
        f"""\
        import sys
        from labeler.cli import main
        assert main(["propose", {str(tmp_path / "proj")!r}]) == 0
        assert main(["pick", {str(tmp_path / "proj")!r}]) == 0
        found = sorted(m for m in sys.modules if m.split(".")[0] in ("dask", "distributed"))
        print("dask modules:", found)
        """
    )
    run = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, timeout=300, env=os.environ
    )
    assert run.returncode == 0, run.stderr
    assert "dask modules: []" in run.stdout


def test_finished_tiles_are_written_in_batches(project, monkeypatch):
    monkeypatch.setattr(cluster_module, "WRITE_BATCH_TILES", 4)
    monkeypatch.setattr(cluster_module, "WRITE_BATCH_SECONDS", 3600.0)
    tiles = project.store.tiles()
    items = [NewProposal(t.id, np.zeros(t.shape, np.uint8)) for t in tiles]
    batches = cluster_module._Batches(project, None)
    batches.add(items[:3])
    assert project.store.latest_proposals() == {} and batches.model_version is None
    batches.add(items[3:5])  # five waiting: one transaction
    assert len(project.store.latest_proposals()) == 5 and batches.written == 5
    batches.add(items[5:])
    assert len(project.store.latest_proposals()) == 5
    batches.flush()
    assert len(project.store.latest_proposals()) == 6 and batches.written == 6
    assert batches.model_version.kind == "cold_start"
    assert {t.state for t in project.store.tiles()} == {"proposed"}


def test_without_the_cluster_extra_the_fix_is_named(monkeypatch):
    monkeypatch.setitem(sys.modules, "distributed", None)  # import distributed fails
    with pytest.raises(
        LabelerError, match=r"--cluster needs Dask.*pip install 'labeler\[cluster\]'"
    ):
        cluster_module.connect("tcp://127.0.0.1:8786", timeout=1)


def add_adapted_encoder_and_head(project) -> str:
    """An adapted encoder version (the ImageNet weights, seeded small changes) and a tiny
    head trained on it, stored as the newest versions; returns the encoder version."""
    import torch

    from labeler.model.checkpoint import save_checkpoint
    from labeler.model.head import HeadConfig, ProposalHead
    from tests.workflow.conftest import adapted_encoder_version

    record = adapted_encoder_version(project)
    torch.manual_seed(5)
    head = ProposalHead(HeadConfig(width=8, refine_channels=4)).eval()
    save_checkpoint(
        project.root / "models" / "tiny-adapted.pt",
        head,
        encoder_version=record.encoder_version,
        val_iou=[0.5] * 4,
    )
    project.store.add_model_version(
        kind="head",
        name="tiny-adapted",
        encoder_version=record.encoder_version,
        checkpoint="models/tiny-adapted.pt",
    )
    return record.encoder_version


def test_a_head_on_an_adapted_encoder_is_proposed_on_the_cluster_as_here(
    tmp_path, images, cluster
):
    local = make_project(tmp_path / "local", images[:2], cache=tmp_path / "cache-local")
    remote = make_project(tmp_path / "remote", images[:2], cache=tmp_path / "cache-remote")
    try:
        version = add_adapted_encoder_and_head(local)
        assert add_adapted_encoder_and_head(remote) == version and "-ssl-" in version
        want = propose(local)
        assert (want.mode, want.proposed) == ("head", 12)
        got = propose(remote, cluster=cluster)
        assert (got.mode, got.proposed, got.cache_misses) == ("head", 12, 12)
        same_as(stored(remote), stored(local))
        # the workers cached the features under the adapted version, never the ImageNet one
        assert {p.name for p in (tmp_path / "cache-remote").iterdir() if p.is_dir()} == {version}
    finally:
        local.close()
        remote.close()

