"""numpydoc sections on the public functions of the store, the workflow and the terminal UI.

Every function a module of ``labeler/store``, ``labeler/workflow`` or ``labeler/tui`` lists
in ``__all__``, and every public method of a class it lists, documents each parameter
under "Parameters" and, unless it returns None, what it returns under "Returns" (numpydoc
docstring standard, numpydoc.readthedocs.io/en/latest/format.html). Methods that override
a framework's (Textual's ``compose``, ``render``, ...) are the framework's to document.
"""

from __future__ import annotations

import importlib
import inspect
import pkgutil
import re

import pytest

PACKAGES = ("labeler.store", "labeler.workflow", "labeler.tui")
_SECTIONS = ("Returns", "Yields", "Raises", "Notes", "Examples", "See Also", "Attributes")


def _is_framework_override(cls: type, name: str) -> bool:
    """True when a base class from outside labeler defines ``name`` too."""
    return any(
        name in vars(base) and not base.__module__.startswith("labeler")
        for base in cls.__mro__[1:]
    )


def public_functions() -> list[tuple[str, object]]:
    found = []
    for package in PACKAGES:
        pkg = importlib.import_module(package)
        for info in pkgutil.iter_modules(pkg.__path__, f"{package}."):
            module = importlib.import_module(info.name)
            for name in getattr(module, "__all__", ()):
                obj = getattr(module, name)
                if getattr(obj, "__module__", None) != module.__name__:
                    continue  # re-exported: checked where it is defined
                if inspect.isfunction(obj):
                    found.append((f"{info.name}.{name}", obj))
                elif inspect.isclass(obj):
                    for attr, fn in vars(obj).items():
                        if attr.startswith("_") or not inspect.isfunction(fn):
                            continue
                        if _is_framework_override(obj, attr):
                            continue
                        found.append((f"{info.name}.{name}.{attr}", fn))
    return found


def _section(doc: str, title: str) -> str | None:
    head = f"{title}\n{'-' * len(title)}"
    if head not in doc:
        return None
    text = doc.split(head, 1)[1]
    for other in _SECTIONS:
        text = text.split(f"\n{other}\n{'-' * len(other)}", 1)[0]
    return text


def _documented_names(section: str) -> set[str]:
    """Names of the entries of a Parameters section (``name : type`` or ``a, b : type``
    lines at the section's own indentation)."""
    names: set[str] = set()
    for line in section.splitlines():
        if line[:1].isspace():
            continue  # a description line
        match = re.fullmatch(r"\*{0,2}(\w+(?:, \*{0,2}\w+)*)(?: : .*)?", line.strip())
        if match:
            names.update(n.strip(" *") for n in match.group(1).split(","))
    return names


FUNCTIONS = public_functions()


def test_the_packages_have_public_functions():
    names = {q for q, _ in FUNCTIONS}
    for expected in (
        "labeler.workflow.annotating.accept_tile",
        "labeler.workflow.annotating.queue_rows",
        "labeler.tui.app.QueueApp.open_editor",
        "labeler.store.records.decode_mask",
    ):
        assert expected in names
    assert len(FUNCTIONS) > 100


@pytest.mark.parametrize(("qualname", "fn"), FUNCTIONS, ids=[q for q, _ in FUNCTIONS])
def test_parameters_and_returns_are_documented(qualname, fn):
    doc = inspect.getdoc(fn) or ""
    signature = inspect.signature(fn)
    params = [p for p in signature.parameters if p not in ("self", "cls")]
    if params:
        section = _section(doc, "Parameters")
        assert section is not None, f"{qualname}: no numpydoc Parameters section"
        documented = _documented_names(section)
        for p in params:
            assert p in documented, f"{qualname}: parameter {p!r} is not documented"
    returns = signature.return_annotation
    if returns not in (None, "None"):
        assert _section(doc, "Returns") is not None or _section(doc, "Yields") is not None, (
            f"{qualname}: no numpydoc Returns section"
        )
