"""The documents in the repository keep up with the code.

The README's layout section and docs/architecture.md name every top-level module of the
package and every module of editor/ and demo/, the architecture page names every import
contract, every Python file the documents name exists, and neither they nor the package,
the tests or the benchmarks point to files outside the repository.
"""

from __future__ import annotations

import re
import tomllib
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
PACKAGE = ROOT / "labeler"


def top_level_names() -> set[str]:
    """Top-level modules and packages of labeler/ (``cli`` for cli/, ``fileio`` for fileio.py)."""
    names = {p.stem for p in PACKAGE.glob("*.py") if p.name != "__init__.py"}
    names |= {p.name for p in PACKAGE.iterdir() if (p / "__init__.py").is_file()}
    return names


def readme_layout() -> str:
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    match = re.search(r"^## How the code is laid out\n(.*?)^## ", text, re.S | re.M)
    assert match, "README.md: no section '## How the code is laid out'"
    return match.group(1)


def architecture() -> str:
    return (ROOT / "docs" / "architecture.md").read_text(encoding="utf-8")


def test_readme_layout_names_every_top_level_module():
    listed = set(re.findall(r"^      ([a-z_]+)(?:/|\.py)\s", readme_layout(), re.M))
    assert top_level_names() <= listed, sorted(top_level_names() - listed)
    for folder in ("tests", "benchmarks", "demo_fields", "docs"):
        assert (ROOT / folder).is_dir()
        assert re.search(rf"^    {folder}/", readme_layout(), re.M), folder


def test_architecture_names_every_room_and_contract():
    text = architecture()
    rooms = set(re.findall(r"^\| `([a-z_]+)(?:/|\.py)` \|", text, re.M))
    assert top_level_names() <= rooms, sorted(top_level_names() - rooms)
    config = tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))
    for contract in config["tool"]["importlinter"]["contracts"]:
        assert f"`{contract['id']}`" in text, contract["id"]
    layers = config["tool"]["importlinter"]["contracts"][0]["layers"]
    section = text.split("\n## Layers\n", 1)[1].split("\n## ", 1)[0]
    drawn = [line.strip() for line in section.splitlines() if line.startswith("    ")]
    assert drawn == [layer.strip("()") for layer in layers]


@pytest.mark.parametrize(
    "path",
    sorted(
        [ROOT / "README.md", ROOT / "docs" / "architecture.md", ROOT / "pyproject.toml",
         ROOT / "Makefile", *PACKAGE.rglob("*.py"), *(ROOT / "benchmarks").rglob("*.py"),
         *(p for p in (ROOT / "tests").rglob("*.py") if p.name != "test_docs.py")]
    ),
    ids=lambda p: p.relative_to(ROOT).as_posix(),
)
def test_no_reference_outside_the_repository(path):
    text = path.read_text(encoding="utf-8")
    machine = "/" + "work/"  # spelled in two parts so this file does not hold it
    for outside in ("../shared", "notes-checks", "DESIGN.md", "DESIGN section", machine,
                    "/tmp/bash_jobs"):
        assert outside not in text, f"{path.relative_to(ROOT)} mentions {outside!r}"


@pytest.mark.parametrize("package", ["editor", "demo"])
def test_layout_and_architecture_name_every_module_of_the_edge_packages(package):
    modules = {p.name for p in (PACKAGE / package).glob("*.py") if p.name != "__init__.py"}
    readme = readme_layout()
    page = architecture()
    for name in sorted(modules):
        assert name in readme, f"README layout section does not name {package}/{name}"
        assert f"`{name}`" in page, f"docs/architecture.md does not name {package}/{name}"
    assert "colour_regions.py" in readme and "`colour_regions.py`" in architecture()


@pytest.mark.parametrize("path", ["README.md", "docs/architecture.md", "docs/label_efficiency.md"])
def test_every_python_file_the_documents_name_exists(path):
    text = (ROOT / path).read_text(encoding="utf-8")
    files = {p.relative_to(ROOT).as_posix() for p in ROOT.rglob("*.py") if ".venv" not in p.parts}
    names = {f.rsplit("/", 1)[-1] for f in files}
    for mention in set(re.findall(r"`([\w/.-]+\.py)`", text)):
        if "/" in mention:
            assert any(f == mention or f.endswith("/" + mention) for f in files), (path, mention)
        else:
            assert mention in names, (path, mention)
