"""The import contracts of pyproject.toml hold, and each one fails on a misplaced import.

Each case copies the package and pyproject.toml into a temporary folder, adds one import
that breaks a room rule, and runs ``lint-imports`` there: it must exit with status 1 and
name the broken contract. The clean copy must pass, so a failure is the added import's.
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import tomllib
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]

#: lint-imports, run by this interpreter (the one import-linter is installed in).
LINT_IMPORTS = (
    "import sys; from importlinter.cli import lint_imports_command; "
    "sys.exit(lint_imports_command())"
)


def contract_names() -> dict[str, str]:
    config = tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))
    return {c["id"]: c["name"] for c in config["tool"]["importlinter"]["contracts"]}


def lint_imports(folder: Path) -> subprocess.CompletedProcess:
    env = {**os.environ, "PYTHONPATH": str(folder), "NO_COLOR": "1", "COLUMNS": "200"}
    return subprocess.run(
        [sys.executable, "-c", LINT_IMPORTS, "--no-cache"],
        cwd=folder,
        env=env,
        capture_output=True,
        text=True,
        timeout=300,
    )


def module_file(folder: Path, module: str) -> Path:
    """The file of ``module`` in the copy: ``a/b/__init__.py`` for a package, else ``a/b.py``."""
    base = folder.joinpath(*module.split("."))
    package = base / "__init__.py"
    return package if package.is_file() else base.with_suffix(".py")


@pytest.fixture(scope="module")
def clean_copy(tmp_path_factory) -> Path:
    folder = tmp_path_factory.mktemp("contracts") / "clean"
    shutil.copytree(ROOT / "labeler", folder / "labeler", ignore=shutil.ignore_patterns("__pycache__"))
    shutil.copy2(ROOT / "pyproject.toml", folder / "pyproject.toml")
    return folder


def test_the_package_keeps_every_contract(clean_copy):
    run = lint_imports(clean_copy)
    assert run.returncode == 0, run.stdout + run.stderr
    for name in contract_names().values():
        assert " ".join(name.split()) in " ".join(run.stdout.split())
    assert "BROKEN" not in run.stdout


@pytest.mark.parametrize(
    ("module", "line", "contract"),
    [
        # a pure room reaching up into the workflow
        ("labeler.masks", "import labeler.workflow", "layers"),
        # the workflow reaching up into an edge
        ("labeler.workflow", "from labeler.tui import run_queue", "layers"),
        # two independent siblings of one layer
        ("labeler.tui", "import labeler.demo", "layers"),
        ("labeler.store", "import labeler.export", "layers"),
        # the bottom layer importing a sibling
        ("labeler.states", "import labeler.classes", "layers"),
        ("labeler.tui", "import torch", "torch"),
        ("labeler.workflow", "from torchvision.ops import FeaturePyramidNetwork", "torch"),
        ("labeler.workflow", "from textual.app import App", "textual"),
        ("labeler.export", "import sqlalchemy", "database"),
        ("labeler.workflow", "import sqlite3", "database-drivers"),
        ("labeler.demo", "from PIL import Image", "image-files"),
        ("labeler.tui", "from labeler.store.records import TileRecord", "edges-use-workflow"),
        ("labeler.picker", "import cv2", "numeric-core"),
        ("labeler.agreement", "import skimage", "numeric-core"),
        # Dask outside the one cluster module, even in the workflow room
        ("labeler.workflow.proposing", "import distributed", "cluster"),
        ("labeler.cli", "import dask", "cluster"),
    ],
)
def test_a_misplaced_import_breaks_its_contract(clean_copy, tmp_path, module, line, contract):
    folder = tmp_path / "broken"
    shutil.copytree(clean_copy, folder)
    target = module_file(folder, module)
    target.write_text(target.read_text(encoding="utf-8") + f"\n{line}  # misplaced\n", encoding="utf-8")
    run = lint_imports(folder)
    assert run.returncode == 1, run.stdout + run.stderr
    name = contract_names()[contract]
    out = " ".join(run.stdout.split())
    assert f"{' '.join(name.split())} BROKEN" in out


@pytest.mark.parametrize(
    ("module", "line"),
    [
        ("labeler.store", "import sqlite3"),
        ("labeler.store.schema", "import sqlite3"),
        ("labeler.tui", "from rich.text import Text"),
        ("labeler.masks", "from rasterio.features import shapes"),
        ("labeler.workflow", "import labeler.masks"),
        ("labeler.export", "import labeler.masks"),
        ("labeler.workflow.cluster", "import distributed"),
    ],
)
def test_an_import_in_its_own_room_keeps_every_contract(clean_copy, tmp_path, module, line):
    folder = tmp_path / "fine"
    shutil.copytree(clean_copy, folder)
    target = module_file(folder, module)
    target.write_text(target.read_text(encoding="utf-8") + f"\n{line}\n", encoding="utf-8")
    run = lint_imports(folder)
    assert run.returncode == 0, run.stdout + run.stderr


def test_a_new_top_level_module_needs_a_layer(clean_copy, tmp_path):
    folder = tmp_path / "extra"
    shutil.copytree(clean_copy, folder)
    (folder / "labeler" / "helpers.py").write_text('"""Nowhere in the layers."""\n')
    run = lint_imports(folder)
    assert run.returncode == 1
    assert "labeler.helpers" in run.stdout
    assert "exhaustive" in run.stdout
