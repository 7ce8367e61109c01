"""Model versions a team shares: weights kept in the database, read by any folder, and
the files of versions made before that read in by ``labeler upgrade`` or on first use
(on SQLite and PostgreSQL).

Plumbing only (no outside reference value): common practice, no source. The SHA-256
reference is Python's ``hashlib``.
"""

import hashlib

import pytest
import sqlalchemy as sa
import torch
from alembic import command

from labeler.cli import main
from labeler.errors import LabelerError
from labeler.model.checkpoint import save_checkpoint
from labeler.model.head import HeadConfig, ProposalHead
from labeler.project import init_project, open_project
from labeler.store import schema as t
from labeler.store.migrate import _config
from labeler.workflow.features import read_checkpoint


def _tiny_head_file(path):
    torch.manual_seed(0)
    head = ProposalHead(HeadConfig(class_indices=(0, 1, 2, 3), width=8))
    save_checkpoint(path, head, encoder_version="lite0-test-r1", val_iou=[0.9, 0.8, 0.7, 0.6])
    return head


def _a_release_2_project(tmp_path):
    """A project whose database is at schema version 2 and whose head is a file only."""
    root = tmp_path / "office"
    init_project(root).close()
    with open_project(root) as p:
        url = p.store.url
    head = _tiny_head_file(root / "models" / "head-1.pt")
    engine = sa.create_engine(url)
    with engine.begin() as conn:
        command.downgrade(_config(conn), "0002")
        conn.execute(sa.text(
            "INSERT INTO model_versions (kind, name, encoder_version, checkpoint, n_train_tiles, "
            "created_at) VALUES ('head', 'head-1', 'lite0-test-r1', 'models/head-1.pt', 3, "
            "CURRENT_TIMESTAMP)"))
    engine.dispose()
    with pytest.raises(LabelerError, match=r"schema version 2, this labeler reads 3"):
        open_project(root)
    return root, head


def test_upgrade_reads_the_folders_model_files_into_the_database(tmp_path, project_store, capsys):
    root, head = _a_release_2_project(tmp_path)
    assert main(["upgrade", str(root)]) == 0
    out = capsys.readouterr().out
    assert "database upgraded from schema version 2 to 3" in out
    assert "model weights read into the database: head-1" in out
    data = (root / "models" / "head-1.pt").read_bytes()
    (root / "models" / "head-1.pt").unlink()  # as on a machine that never had the file
    with open_project(root) as p:
        [mv] = p.store.model_versions()
        assert (mv.number, mv.weights_sha256) == (1, hashlib.sha256(data).hexdigest())
        loaded, meta, path = read_checkpoint(p, mv)
        assert meta.encoder_version == "lite0-test-r1"
        assert path == root / "models" / f"head-{mv.weights_sha256[:12]}.pt"
        assert path.read_bytes() == data  # this machine's copy, written from the database
    for (k, a), (_, b) in zip(head.state_dict().items(), loaded.state_dict().items(), strict=True):
        torch.testing.assert_close(a, b, rtol=0, atol=0, msg=k)
    # a second run has nothing to read in
    assert main(["upgrade", str(root)]) == 0
    assert "nothing to do" in capsys.readouterr().out


def test_a_version_whose_file_is_here_is_read_in_on_first_use(tmp_path, project_store, capsys):
    root, _ = _a_release_2_project(tmp_path)
    from labeler.project import upgrade_project

    assert upgrade_project(root)[:2] == (2, t.SCHEMA_VERSION)  # tables only, files stay
    assert main(["status", str(root)]) == 0
    assert ("model weights not in the database yet: head-1 (run 'labeler upgrade DIR' on the "
            "machine that made them)") in capsys.readouterr().out
    with open_project(root) as p:
        [mv] = p.store.model_versions()
        assert mv.weights_sha256 is None
        read_checkpoint(p, mv)
        assert p.store.model_weights(mv.id) == (root / "models" / "head-1.pt").read_bytes()
        assert len(p.store.events(kind="model_weights_kept")) == 1
    assert main(["status", str(root)]) == 0
    assert "model weights not in the database yet" not in capsys.readouterr().out


def test_a_version_without_weights_or_file_names_the_fix(tmp_path, project_store):
    root, _ = _a_release_2_project(tmp_path)
    (root / "models" / "head-1.pt").unlink()
    from labeler.project import upgrade_project

    upgrade_project(root)
    with open_project(root) as p, pytest.raises(
        LabelerError, match=r"cannot load the model head-1 \(model head-1: its weights are not in "
        r"the project's database and this machine has no file models/head-1.pt; run 'labeler "
        r"upgrade DIR' in the folder of the machine that made it"
    ):
        read_checkpoint(p, p.store.model_versions()[0])
