"""Annotation effort per model version: medians and the share accepted unchanged.

The records are hand-made (common practice, no source); the medians are checked against
``statistics.median`` of the Python standard library (for an even count: the mean of the
two middle values) and by hand.
"""

from __future__ import annotations

import statistics

import numpy as np

from labeler.states import KIND_WEAK
from labeler.store import NewProposal
from labeler.workflow import effort_by_model, save_tile_mask
from labeler.workflow.effort import SaveEffort, summarise_effort
from labeler.workflow.status import project_status

#: The hand-made saves of :func:`record_saves`: (model, tile, actions, seconds, unchanged).
SAVES = (
    ("cold-start", 0, 4, 30.0, False),
    ("cold-start", 1, 0, 2.0, True),
    ("cold-start", 2, 10, 50.0, False),
    ("head-1", 3, 0, 1.5, True),
    ("head-1", 4, 2, 3.5, False),
)


def record_saves(project) -> dict[str, int]:
    """Two model versions, each proposing all soil on every tile, and the saves of
    :data:`SAVES` started from them (a weak-label save and a save without a proposal
    besides, which the figures leave out). Returns model name -> version id."""
    store = project.store
    tiles = store.tiles()
    ids = {}
    for kind, name in (("cold_start", "cold-start"), ("head", "head-1")):
        mv = store.add_model_version(kind=kind, name=name)
        ids[name] = mv.id
        store.add_proposals(mv.id, [NewProposal(t.id, np.zeros(t.shape, np.uint8)) for t in tiles])
    for model, i, actions, seconds, unchanged in SAVES:
        t = tiles[i]
        mask = np.zeros(t.shape, np.uint8)
        if not unchanged:
            mask[:10, :10] = 2
        pid = _proposal_id(store, t.id, ids[model])
        save_tile_mask(project, t.id, "ines", mask, parent_version=None, actions=actions,
                       seconds=seconds, proposal_id=pid)
    weak = np.full(tiles[5].shape, 255, np.uint8)
    weak[:4, :4] = 1
    rec = save_tile_mask(project, tiles[5].id, "ines", weak, parent_version=None,
                         kind=KIND_WEAK, actions=99, seconds=999.0)
    save_tile_mask(project, tiles[5].id, "ines", np.ones(tiles[5].shape, np.uint8),
                   parent_version=rec.version, actions=77, seconds=777.0)  # no proposal named
    return ids


def _proposal_id(store, tile_id: int, model_version_id: int) -> int:
    version_of = store.proposal_model_versions()
    found = [pid for pid, mv in version_of.items() if mv == model_version_id
             and store.proposal(pid).tile_id == tile_id]
    assert len(found) == 1
    return found[0]


def test_summarise_effort_medians_and_share_by_hand():
    saves = [SaveEffort(model_version_id=m, actions=a, seconds=s, accepted=u)
             for m, a, s, u in [(3, 4, 30.0, False), (3, 0, 2.0, True), (3, 10, 50.0, False),
                                (1, 0, 1.5, True), (1, 2, 3.5, False)]]
    rows = summarise_effort(saves, {3: "head-1"})
    assert [r.model_version_id for r in rows] == [1, 3]  # oldest version first
    old, new = rows
    assert (old.model, old.saves) == ("model 1", 2)  # a version without a name
    assert (old.median_actions, old.median_seconds, old.accepted_share) == (1.0, 2.5, 0.5)
    assert (new.model, new.saves) == ("head-1", 3)
    assert (new.median_actions, new.median_seconds) == (4.0, 30.0)
    assert new.accepted_share == 1 / 3
    # the reference: statistics.median (Python standard library)
    assert new.median_actions == statistics.median([4, 0, 10])
    assert old.median_seconds == statistics.median([1.5, 3.5])
    assert summarise_effort([], {}) == []


def test_effort_by_model_reads_the_saves_from_proposals_only(project):
    ids = record_saves(project)
    rows = effort_by_model(project)
    assert [(r.model_version_id, r.model) for r in rows] == [
        (ids["cold-start"], "cold-start"), (ids["head-1"], "head-1")
    ]
    cold, head = rows
    assert (cold.saves, cold.median_actions, cold.median_seconds) == (3, 4.0, 30.0)
    assert cold.accepted_share == 1 / 3
    assert (head.saves, head.median_actions, head.median_seconds) == (2, 1.0, 2.5)
    assert head.accepted_share == 0.5
    # the team's effort falls from one version to the next
    assert head.median_actions < cold.median_actions
    assert project_status(project).effort == rows


def test_no_saves_no_rows(project):
    assert effort_by_model(project) == []
    assert project_status(project).effort == []


def test_status_command_prints_the_effort_table(project, capsys):
    from labeler.cli import main

    record_saves(project)
    assert main(["status", str(project.root)]) == 0
    out = capsys.readouterr().out
    assert "effort per model version (saves started from its proposals)" in out
    lines = out.splitlines()
    header = next(i for i, s in enumerate(lines) if "median actions" in s)
    rows = [s.split() for s in lines[header + 1:] if s.strip() and not set(s) <= set("-+| ")]
    # the cells of format_effort: model, saves, median actions, median seconds, share
    assert ["cold-start", "3", "4", "30.0", "33", "%"] in [[c for c in r if c != "|"]
                                                        for r in rows]
    assert ["head-1", "2", "1", "2.5", "50", "%"] in [[c for c in r if c != "|"] for r in rows]
