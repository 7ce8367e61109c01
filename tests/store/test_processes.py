"""Crash and race safety of saves, with real processes, on SQLite and PostgreSQL: a kill
loses no committed save; of two saves from the same parent exactly one lands (the other is
kept as a draft); writers saving one tile as fast as they can never land a save on a
stale parent.
"""

import contextlib
import os
import signal
import subprocess
import sys
import textwrap
import time

import numpy as np
import pytest

from labeler.store import Store
from tests.common import REPO, start_together
from tests.store.conftest import make_store

WRITER = textwrap.dedent(
    """
    import sys, numpy as np
    from labeler.store import Store
    store = Store(sys.argv[1])
    tile = store.tiles()[0]
    rng = np.random.default_rng(0)
    parent = store.lineage_head(tile.id, "ines")
    v = 0
    while True:
        v += 1
        # a mask that is costly to encode, so the kill often lands inside a save
        mask = (rng.random(tile.shape) < 0.5).astype(np.uint8) * (v % 4)
        mask[0, 0] = v % 4
        rec = store.save_annotation(tile.id, "ines", mask, parent_version=parent)
        parent = rec.version
        print(rec.version, int(mask.sum()), flush=True)
    """
)


def _env():
    env = dict(os.environ)
    env["PYTHONPATH"] = str(REPO) + os.pathsep + env.get("PYTHONPATH", "")
    return env


def test_sigkill_during_saves_loses_nothing_committed(store_url):
    make_store(store_url).close()
    url = store_url
    proc = subprocess.Popen(
        [sys.executable, "-c", WRITER, url], stdout=subprocess.PIPE, text=True, env=_env()
    )
    committed = {}
    deadline = time.monotonic() + 60
    try:
        while len(committed) < 15 and time.monotonic() < deadline:
            line = proc.stdout.readline()
            if not line:
                break
            version, total = map(int, line.split())
            committed[version] = total
    finally:
        proc.send_signal(signal.SIGKILL)  # in the middle of the next save
        proc.wait(10)
        proc.stdout.close()
    assert len(committed) >= 15, "the writer did not get going"
    store = Store(url)
    assert store.integrity_check() == "ok"  # SQLite PRAGMA integrity_check; a query on a server
    tile = store.tiles()[0]
    history = {a.version: a for a in store.annotation_history(tile.id)}
    for version, total in committed.items():
        assert version in history, f"committed version {version} was lost"
        assert int(history[version].mask().sum()) == total  # intact, decodes to the same mask
    # the store stays usable: the next save from the newest version works
    head = max(history)
    assert (
        store.save_annotation(
            tile.id, "tomas", np.zeros(tile.shape, np.uint8), parent_version=head
        ).version
        == head + 1
    )
    store.close()


RACER = textwrap.dedent(
    """
    import sys, numpy as np
    from labeler.errors import ConflictError
    from labeler.store import Store
    url, name, value = sys.argv[1], sys.argv[2], int(sys.argv[3])
    store = Store(url)
    tile = store.tiles()[0]
    mask = np.full(tile.shape, value, np.uint8)
    parent = store.lineage_head(tile.id, name)   # both read the same parent (none)
    print("ready", flush=True)                   # tell the test, then wait for its word
    if sys.stdin.readline().strip() != "go":
        sys.exit("racer: expected 'go' on stdin")
    try:
        store.save_annotation(tile.id, name, mask, parent_version=parent)
        print("saved", flush=True)
    except ConflictError as exc:
        # what the editor does: keep the work as a draft, never overwrite
        store.save_draft(tile.id, name, mask, parent_version=parent)
        print("conflict", exc.current_version, flush=True)
    """
)


def test_two_processes_same_parent_exactly_one_wins(store_url):
    make_store(store_url).close()
    url = store_url
    with contextlib.ExitStack() as stack:
        procs = [
            stack.enter_context(
                subprocess.Popen(
                    [sys.executable, "-c", RACER, url, name, str(v)],
                    stdin=subprocess.PIPE,
                    stdout=subprocess.PIPE,
                    stderr=subprocess.PIPE,
                    text=True,
                    env=_env(),
                )
            )
            for name, v in (("ines", 1), ("tomas", 2))
        ]
        # both have read their parent (none) before either may save: lined up by pipes
        outs = start_together(procs, timeout=60)
    assert [p.returncode for p in procs] == [0, 0], outs
    results = [o[0].split()[0] for o in outs]
    assert sorted(results) == ["conflict", "saved"], outs
    winner, loser = ("ines", "tomas") if results[0] == "saved" else ("tomas", "ines")
    assert outs[results.index("conflict")][0].split()[1] == "1"  # the winner's version
    store = Store(url)
    tile = store.tiles()[0]
    history = store.annotation_history(tile.id)
    assert [a.annotator for a in history] == [winner]  # exactly one save landed
    values = {"ines": 1, "tomas": 2}
    assert (history[0].mask() == values[winner]).all()
    draft = store.load_draft(tile.id, loser)  # the loser's mask is kept, not lost
    assert draft is not None and (draft.mask == values[loser]).all()
    store.close()


STRESSER = textwrap.dedent(
    """
    import sys, numpy as np
    from labeler.errors import ConflictError
    from labeler.store import Store
    url, name, saves, ready = sys.argv[1], sys.argv[2], int(sys.argv[3]), sys.argv[4]
    store = Store(url)
    tile = store.tiles()[0]
    mask = np.zeros(tile.shape, np.uint8)
    open(ready, "w").close()                     # ready-file: connected and set up
    if sys.stdin.readline().strip() != "go":
        sys.exit("stresser: expected 'go' on stdin")
    done = conflicts = 0
    while done < saves:
        parent = store.lineage_head(tile.id, name)
        mask[0, 0] = done % 4
        try:
            store.save_annotation(tile.id, name, mask, parent_version=parent, seconds=1.0)
            done += 1
        except ConflictError:
            conflicts += 1                       # someone saved first: reread and try again
    store.close()
    print(done, conflicts, flush=True)
    """
)


@pytest.mark.parametrize("writers", [2, 4])
def test_concurrent_writers_never_save_on_a_stale_parent(store_url, tmp_path, writers):
    """Every save names the version it replaced: the history is one unbroken chain.

    Without the tile lock, PostgreSQL's READ COMMITTED let saves land on a stale
    parent (common practice, no source: the check and the insert must see one state).
    """
    saves = 150
    make_store(store_url).close()
    with contextlib.ExitStack() as stack:
        procs = []
        for i in range(writers):
            ready = tmp_path / f"ready-{i}"
            procs.append(
                (
                    ready,
                    stack.enter_context(
                        subprocess.Popen(
                            [
                                sys.executable,
                                "-c",
                                STRESSER,
                                store_url,
                                f"w{i}",
                                str(saves),
                                str(ready),
                            ],
                            stdin=subprocess.PIPE,
                            stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE,
                            text=True,
                            env=_env(),
                        )
                    ),
                )
            )
        for ready, p in procs:  # wait on each ready-file by polling the process
            while not ready.exists():
                assert p.poll() is None, p.stderr.read()
                os.sched_yield()
        for _, p in procs:  # all start saving at once
            p.stdin.write("go\n")
            p.stdin.flush()
        outs = [p.communicate(timeout=300) for _, p in procs]
    assert [p.returncode for _, p in procs] == [0] * writers, outs
    counts = [tuple(map(int, o[0].split())) for o in outs]
    assert [c[0] for c in counts] == [saves] * writers
    with Store(store_url) as store:
        tile = store.tiles()[0]
        history = store.annotation_history(tile.id)
    assert len(history) == writers * saves  # no save lost
    stale = [a for a in history if a.parent_version != (a.version - 1 or None)]
    assert stale == []
    assert [a.version for a in history] == list(range(1, writers * saves + 1))


NUMBERER = textwrap.dedent(
    """
    import os, sys
    from labeler.store import Store
    url, ready, go, count = sys.argv[1], sys.argv[2], sys.argv[3], int(sys.argv[4])
    store = Store(url)
    open(ready, "w").close()                     # ready-file: connected
    while not os.path.exists(go):                # the test's word: all are connected
        os.sched_yield()
    names = [store.add_model_version(kind="head", weights=b"w" * 8).name for _ in range(count)]
    print(" ".join(names), flush=True)
    """
)


def test_two_machines_training_at_once_get_distinct_numbers(store_url, tmp_path):
    """The database numbers versions: 2 writers x 20 heads are head-1 ... head-40."""
    make_store(store_url).close()
    go = tmp_path / "go"
    procs = []
    with contextlib.ExitStack() as stack:
        for i in range(2):
            ready = tmp_path / f"ready-{i}"
            procs.append((ready, stack.enter_context(subprocess.Popen(
                [sys.executable, "-c", NUMBERER, store_url, str(ready), str(go), "20"],
                stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=_env(),
            ))))
        for ready, p in procs:
            while not ready.exists():
                assert p.poll() is None, p.stderr.read()
                os.sched_yield()
        go.touch()
        outs = [p.communicate(timeout=120) for _, p in procs]
    assert [p.returncode for _, p in procs] == [0, 0], outs
    names = [n for out, _ in outs for n in out.split()]
    assert sorted(names) == sorted(f"head-{n}" for n in range(1, 41))
    with Store(store_url) as store:
        assert sorted(m.number for m in store.model_versions()) == list(range(1, 41))
