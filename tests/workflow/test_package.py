"""The workflow package loads its stages on first use (PEP 562 module ``__getattr__``)."""

import importlib
import subprocess
import sys

import pytest

import labeler.workflow as workflow


@pytest.mark.parametrize("name", workflow.__all__)
def test_every_public_name_comes_from_its_stage(name):
    module = importlib.import_module(f"labeler.workflow.{workflow._WHERE[name]}")
    assert getattr(workflow, name) is getattr(module, name)


def test_the_table_and_all_name_the_same_things():
    assert sorted(workflow._WHERE) == sorted(workflow.__all__)
    assert set(workflow.__all__) <= set(dir(workflow))


def test_unknown_names_are_an_attribute_error():
    with pytest.raises(AttributeError, match=r"module 'labeler.workflow' has no attribute 'nope'"):
        workflow.nope  # noqa: B018


def test_importing_the_package_loads_no_stage():
    code = (
        "import sys, labeler.workflow\n"
        "print(sorted(m for m in sys.modules if m.startswith('labeler.workflow.')))"
    )
    out = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, check=True
    ).stdout
    assert out.strip() == "[]"
