"""Two ``labeler init`` against one empty database at the same moment: exactly one
project is made, the other command fails with one clear line, on SQLite and PostgreSQL.

The two processes are lined up with pipes (each says "ready" once imported and waits
for "go"), not with sleeps.
"""

import contextlib
import os
import subprocess
import sys
import textwrap

import sqlalchemy as sa

from labeler.store import Store
from tests.cli.conftest import one_error_line
from tests.common import REPO, start_together

INIT = textwrap.dedent(
    """
    import sys
    from labeler.cli import main
    print("ready", flush=True)
    if sys.stdin.readline().strip() != "go":
        sys.exit("init racer: expected 'go' on stdin")
    sys.exit(main(["init", sys.argv[1], "--store", sys.argv[2]]))
    """
)


def _env():
    env = dict(os.environ)
    env.pop("LABELER_STORE_URL", None)
    env["PYTHONPATH"] = str(REPO) + os.pathsep + env.get("PYTHONPATH", "")
    return env


def test_two_inits_on_one_empty_database_make_one_project(store_url, tmp_path):
    folders = [tmp_path / "office", tmp_path / "barn"]
    with contextlib.ExitStack() as stack:
        procs = [
            stack.enter_context(subprocess.Popen(
                [sys.executable, "-c", INIT, str(folder), store_url],
                stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                text=True, env=_env(),
            ))
            for folder in folders
        ]
        # both imported and waiting before either starts
        outs = start_together(procs, timeout=120)
    codes = [p.returncode for p in procs]
    assert sorted(codes) == [0, 1], outs
    loser = codes.index(1)
    line = one_error_line(outs[loser][1])
    assert "already holds a labeler project" in line and "labeler join" in line, line
    assert folders[1 - loser].is_dir() and not folders[loser].exists()  # nothing made
    with Store(store_url) as store:
        assert store.project_id() is not None
        assert len(store.events(kind="project_claimed")) == 1
    engine = sa.create_engine(store_url)
    with engine.connect() as conn:  # one identity, one schema version row
        assert conn.execute(sa.text("SELECT COUNT(*) FROM meta WHERE key = 'project_id'")).scalar() == 1
        assert conn.execute(sa.text("SELECT COUNT(*) FROM meta WHERE key = 'schema_version'")).scalar() == 1
    engine.dispose()
