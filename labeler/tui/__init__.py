"""The Textual terminal queue (the only room that imports textual).

``labeler queue DIR --annotator NAME`` calls :func:`run_queue`. Modules:

* :mod:`labeler.tui.app` -- the app, notifications, starting the editor, ``run_queue``;
* :mod:`labeler.tui.queue_screen`, :mod:`~labeler.tui.agreement_screen`,
  :mod:`~labeler.tui.model_screen`, :mod:`~labeler.tui.help_screen` -- the screens;
* :mod:`labeler.tui.preview` -- the half-block tile renderer (numpy in, Rich text out);
* :mod:`labeler.tui.rows`, :mod:`~labeler.tui.figures` -- cell texts and filters;
* :mod:`labeler.tui.keys`, :mod:`~labeler.tui.launch` -- the keys, the editor command;
* ``labeler.tcss`` -- every layout rule and colour of the screens.
"""

__all__ = ["run_queue", "QueueApp"]


def __getattr__(name: str):
    # imported on first use, so `labeler.tui.preview` loads without the whole app
    if name in __all__:
        from labeler.tui import app

        return getattr(app, name)
    raise AttributeError(f"module 'labeler.tui' has no attribute {name!r}")
