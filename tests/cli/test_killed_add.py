"""A ``labeler add`` killed (SIGKILL) at each stage leaves nothing the next command keeps.

The add runs in a subprocess with one step replaced by "tell the test, then wait": the
test reads the child's signal from a pipe (no sleeps), kills it, and runs ``labeler
status``, which tidies what the add left. The project then has exactly the files and
rows it had before the add (or, when the kill came after the store knew the image, the
image and nothing more).
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import textwrap

import pytest

from tests.cli.conftest import fingerprint, run

pytestmark = pytest.mark.skipif(not hasattr(signal, "SIGKILL"), reason="needs POSIX signals")

#: The child: patch one step to signal on fd READY and then block until killed.
CHILD = textwrap.dedent(
    """
    import os, sys
    ready, stage = int(sys.argv[1]), sys.argv[2]

    def stop_here():
        os.write(ready, b"R")
        os.read(0, 1)  # stdin is a pipe the test never writes: blocks until the kill

    if stage == "copying":
        import labeler.fileio as fileio

        def copyfile(src, dst):
            with open(src, "rb") as fi, open(dst, "wb") as fo:
                fo.write(fi.read(500))
                fo.flush()
            stop_here()

        fileio.shutil.copyfile = copyfile
    elif stage == "copied":
        from labeler.store.images import ImagesMixin

        ImagesMixin.add_image = lambda self, *args, **kwargs: stop_here()
    elif stage == "stored":
        from labeler.fileio import Claim

        Claim.release = lambda self: stop_here()
    from labeler.cli import main

    main(sys.argv[3:])
    """
)


def _kill_add_at(stage, project, image):
    r, w = os.pipe()
    proc = subprocess.Popen(
        [sys.executable, "-c", CHILD, str(w), stage, "add", str(project), str(image)],
        stdin=subprocess.PIPE,
        stdout=subprocess.DEVNULL,
        stderr=subprocess.PIPE,
        pass_fds=(w,),
    )
    os.close(w)
    try:
        signalled = os.read(r, 1)
    finally:
        os.close(r)
    proc.kill()  # SIGKILL: no handler, no cleanup
    proc.wait(timeout=60)
    err = proc.stderr.read().decode()
    proc.stderr.close()
    proc.stdin.close()
    assert signalled == b"R", err
    assert proc.returncode == -signal.SIGKILL


@pytest.mark.parametrize("stage", ["copying", "copied"])
def test_add_killed_before_the_store_knew_the_image(project, incoming, capsys, stage):
    before = fingerprint(project)
    _kill_add_at(stage, project, incoming["leaf"])
    left = sorted(p.name for p in (project / "images").iterdir())
    assert ".adding-leaf" in left  # the claim of the killed add
    assert fingerprint(project) != before
    code, out, err = run(["status", project], capsys)
    assert code == 0, err
    assert fingerprint(project) == before  # copy, temporary file and claim are gone
    assert "1 images, 6 tiles" in out


def test_add_killed_after_the_store_knew_the_image(project, incoming, capsys):
    _kill_add_at("stored", project, incoming["leaf"])
    code, out, err = run(["status", project], capsys)
    assert code == 0, err
    assert "2 images, 7 tiles" in out
    assert sorted(p.name for p in (project / "images").iterdir()) == [
        "leaf.png",
        "north-strip.tif",
    ]
