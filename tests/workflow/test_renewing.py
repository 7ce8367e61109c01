"""Renewing the proposals after a retrain: the open tiles only, then a new queue order.

Plumbing only (a test-sized step budget); proposal quality is measured by
benchmarks/proposal_quality.py.
"""

import re

import numpy as np
import pytest
from PIL import Image

from labeler.cli import main
from labeler.demo.build import demo_images, truth_path
from labeler.project import init_project, open_project
from labeler.states import SAVED_STATES
from labeler.workflow import (
    add_images,
    background_work,
    propose,
    renew_proposals,
    retrain,
    save_tile_mask,
)

SETTINGS = "[model]\nepochs = 2\nmc_samples = 2\nmin_labelled_tiles = 3\n"


@pytest.fixture
def saved_three(tmp_path):
    """An invented Brackenlow Farm plot (20 tiles), cold-start proposals, 3 saved tiles."""
    plot = demo_images()[0]
    root = tmp_path / "proj"
    init_project(root).close()
    (root / "labeler.toml").write_text(SETTINGS)
    project = open_project(root)
    add_images(project, [plot])
    propose(project)  # cold start on every tile
    truth = np.asarray(Image.open(truth_path(plot)))
    for t in project.store.tiles()[:3]:
        save_tile_mask(project, t.id, "survey", truth[t.window.slices], parent_version=None)
    yield project
    project.close()


def test_renewal_gives_open_tiles_the_new_model_and_leaves_saved_and_held_ones(saved_three):
    project = saved_three
    store = project.store
    tiles = store.tiles()
    held = tiles[5].id
    store.hold(held, "ines")
    before = store.latest_proposals()
    mv = retrain(project).model_version
    seen = []
    renewed = renew_proposals(project, progress=lambda d, t, label: seen.append((d, t)))
    assert renewed.renewed == len(tiles) - 3 - 1 and renewed.proposals.left_alone == 4
    assert seen[-1] == (16, 16)
    after = store.latest_proposals()
    for t in store.tiles():
        if t.state in SAVED_STATES or t.id == held:
            assert after[t.id].id == before[t.id].id  # untouched
        else:
            assert after[t.id].model_version_id == mv.id
            assert after[t.id].mean_bald is not None  # uncertainty of the new head
    # the queue order was made again from the new proposals
    assert renewed.picked is not None and renewed.note == ""
    assert {i.tile_id for i in renewed.picked.items} >= {
        t.id for t in store.tiles() if after[t.id].model_version_id == mv.id
    }
    # a second renewal finds every open tile up to date
    again = renew_proposals(project)
    assert again.renewed == 0 and again.proposals.up_to_date == len(tiles) - 4


def test_retrain_command_says_how_many_tiles_it_renewed(saved_three, capsys):
    assert main(["retrain", str(saved_three.root)]) == 0
    out = capsys.readouterr().out
    assert re.search(r"took \d+\.\d s \(32 optimiser steps\)", out)
    assert re.search(
        r"renewed the proposals of 17 tiles with head-1 in \d+\.\d s; 3 tiles with a saved "
        r"mask or held by someone keep theirs; the queue is re-picked",
        out,
    )


def test_background_work_caps_torch_threads_and_restores_them():
    import threading

    import torch

    from labeler.model.runtime import available_cores, configure_threads

    before = torch.get_num_threads()
    seen = {}

    def job():
        with background_work(nice=0):
            seen["inside"] = torch.get_num_threads()
            seen["configured"] = configure_threads(64)  # an explicit count is capped too

    worker = threading.Thread(target=job)
    worker.start()
    worker.join()
    cap = max(1, available_cores() - 1)  # the free cores (at most all of them) less one
    assert seen["inside"] <= cap and seen["configured"] <= cap
    assert torch.get_num_threads() == before


def test_renewal_overlaps_its_stages_only_in_the_foreground(monkeypatch):
    import threading

    from labeler.workflow import renewing

    asked = []

    def fake_propose(project, **kwargs):
        asked.append(kwargs["overlap"])
        return "proposals"

    monkeypatch.setattr(renewing, "propose", fake_propose)
    monkeypatch.setattr(renewing, "pick_tiles", lambda project: None)
    renewing.renew_proposals(object())  # a command: overlap when a core is spare

    def job():
        with background_work(nice=0):  # the queue's worker: its spare core stays free
            renewing.renew_proposals(object())
        renewing.renew_proposals(object())  # after it, the thread is foreground again

    worker = threading.Thread(target=job)
    worker.start()
    worker.join()
    assert asked == [None, False, None]
