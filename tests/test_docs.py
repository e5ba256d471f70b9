"""The docs and hints a user copies: every install line names the distribution ``trainkit-concrete``.

The name ``trainkit`` on the package index is an unrelated library, so a hint such as
``pip install`` of ``trainkit`` with the dask extra would install someone else's code. The check reads the
package source, the README, the contributor guide, docs/ and the notebooks (their cells),
finds each ``pip install`` (also ``pip3``, ``uv pip``, ``uv add``) and reads its arguments
as requirements (PEP 508: a name, then optional ``[extras]`` and a version).
"""

from __future__ import annotations

import json
import re
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]

#: The one distribution install hints may name for this kit, and the name they must not use.
DISTRIBUTION = "trainkit-concrete"
FORBIDDEN = "trainkit"

_INSTALL = re.compile(r"\b(?:pip3?\s+install|uv\s+add)\b")
# A requirement: a project name, optional extras, optional version specifier (PEP 508).
_REQUIREMENT = re.compile(r"^([A-Za-z0-9][A-Za-z0-9._-]*)(\[[^\]]*\])?(?:[<>=!~].*)?$")
# Options of pip install that take a value (the value is not a requirement).
_OPTIONS_WITH_VALUE = {"-r", "--requirement", "-c", "--constraint", "-i", "--index-url"}
_QUOTES = "'\"`"


def _normalise(name: str) -> str:
    """A project name as the package index compares it (PEP 503)."""
    return re.sub(r"[-_.]+", "-", name).lower()


def install_requirements(line: str) -> list[str]:
    """The requirement names each install command on one line of text asks for.

    The arguments end where the command does: at a closing backtick or parenthesis,
    at a token opening a parenthesis (prose such as ``(or ...``), or at the line's end.
    """
    names: list[str] = []
    for match in _INSTALL.finditer(line):
        skip_next = False
        for raw in line[match.end() :].split():
            if raw.startswith("("):
                break
            ends_command = raw.endswith(("`", ")")) or raw.rstrip(_QUOTES).endswith(")")
            token = raw.strip(_QUOTES).rstrip(",;:)").strip(_QUOTES)
            if skip_next:
                skip_next = False
            elif token.startswith("-"):
                skip_next = token in _OPTIONS_WITH_VALUE
            elif m := _REQUIREMENT.match(token):
                names.append(m.group(1))
            if ends_command or token in {"&&", "||", ";"}:
                break
    return names


def _text_lines(path: Path) -> list[str]:
    """The lines a reader sees: a notebook's cell sources, any other file's text."""
    text = path.read_text(encoding="utf-8")
    if path.suffix != ".ipynb":
        return text.splitlines()
    lines: list[str] = []
    for cell in json.loads(text)["cells"]:
        source = cell["source"]
        lines.extend(("".join(source) if isinstance(source, list) else source).splitlines())
    return lines


def documented_files() -> list[Path]:
    """The package source, README.md, DEVELOPERS.md, docs/ and notebooks/ (text files)."""
    files = [ROOT / "README.md", ROOT / "DEVELOPERS.md"]
    for folder, patterns in (
        (ROOT / "trainkit", ("*.py", "*.yaml", "*.md")),
        (ROOT / "docs", ("*.py", "*.md")),
        (ROOT / "notebooks", ("*.ipynb", "*.md", "*.py")),
    ):
        for pattern in patterns:
            files.extend(sorted(folder.rglob(pattern)))
    return [f for f in files if f.is_file() and ".ipynb_checkpoints" not in f.parts]


def wrong_install_hints(files: list[Path], root: Path = ROOT) -> list[str]:
    """``file:line: text`` for every install line that would fetch the other distribution."""
    found = []
    for path in files:
        for number, line in enumerate(_text_lines(path), start=1):
            if any(_normalise(n) == FORBIDDEN for n in install_requirements(line)):
                found.append(f"{path.relative_to(root)}:{number}: {line.strip()}")
    return found


@pytest.mark.parametrize(
    ("line", "expected"),
    [
        # the bad lines are joined at run time so that no file of the repository holds one
        ("pip install 'train" + "kit[dask]'", [FORBIDDEN]),
        ("needs dask.distributed: pip install 'train" + "kit[dask]'\"", [FORBIDDEN]),
        ("(``pip install --no-deps trainkit`` plus", [FORBIDDEN]),
        ("`pip install trainkit==0.1`", [FORBIDDEN]),
        ("uv pip install Trainkit", ["Trainkit"]),
        ("`pip install 'trainkit-concrete[train]'` gives the whole", ["trainkit-concrete"]),
        ("pip install -e '.[train,dev]'", []),
        ("pip install -r requirements.txt trainkit_concrete", ["trainkit_concrete"]),
        (
            "pip install {pw.package} (or pip install 'trainkit-concrete[train]')",
            ["trainkit-concrete"],
        ),
        ("`pip install numpy` so that train" + "kit runs", ["numpy"]),
        ("pip uninstall --yes trainkit", []),
    ],
)
def test_install_requirements_reads_the_command(line, expected):
    assert install_requirements(line) == expected


def test_the_check_names_file_and_line_of_a_wrong_hint_in_a_notebook_cell(tmp_path):
    nb = tmp_path / "x.ipynb"
    wrong = f"!pip install '{FORBIDDEN}[train]'"
    cells = [
        {"cell_type": "markdown", "source": ["Set up:\n", "`pip install trainkit-concrete`\n"]},
        {"cell_type": "code", "source": wrong},
    ]
    nb.write_text(json.dumps({"cells": cells}), encoding="utf-8")
    assert wrong_install_hints([nb], root=tmp_path) == [f"x.ipynb:3: {wrong}"]


def test_every_install_hint_names_the_kits_distribution():
    files = documented_files()
    names = {f.relative_to(ROOT).as_posix() for f in files}
    assert {"README.md", "DEVELOPERS.md", "notebooks/walkthrough.ipynb"} <= names
    assert "trainkit/screener/scan.py" in names
    wrong = wrong_install_hints(files)
    assert not wrong, (
        f"install hints must name {DISTRIBUTION!r} (the index's {FORBIDDEN!r} is another "
        "library):\n" + "\n".join(wrong)
    )


def test_train_help_says_where_imagenet_weights_come_from():
    """``--weights imagenet`` reads the packaged file for backbones that have one (models.py)."""
    from click.testing import CliRunner

    from trainkit.cli import cli
    from trainkit.learning.models import BACKBONES

    res = CliRunner().invoke(cli, ["train", "--help"], terminal_width=1000)
    assert res.exit_code == 0, res.output
    (line,) = [ln for ln in res.output.splitlines() if ln.strip().startswith("--weights")]
    packaged = [n for n, b in BACKBONES.items() if b.packaged_weights is not None]
    assert packaged
    for name in packaged:
        assert name in line and "packaged" in line, line
    assert "download" in line  # the torchvision source may fetch a missing file


def test_notebook_texts_describe_the_demo_recipe_as_it_is():
    """What the walkthrough and its README say of the ``demo`` recipe matches configs/train/demo.yaml."""
    from trainkit.learning.config import load_train_config

    cfg = load_train_config("demo")
    for path in (ROOT / "notebooks" / "README.md", ROOT / "notebooks" / "walkthrough.ipynb"):
        text = " ".join(_text_lines(path))
        claimed = re.findall(r"recipe's (?:own )?(\d+) epochs|cut from its (\d+) epochs", text)
        assert claimed, path
        assert {int(a or b) for a, b in claimed} == {cfg.epochs}, path
        if cfg.weights is not None:  # a pretrained start, not random initialisation
            assert "random initialisation" not in text, path
        others = [n for n in ("tiny_cnn", "mobilenet_v3_small", "resnet18") if n != cfg.backbone]
        assert not any(n in text for n in others), path


def test_the_package_ships_its_type_marker():
    """PEP 561: ``trainkit/py.typed`` exists and package-data puts it in the wheel.

    (A wheel built from this tree was checked by hand to hold ``trainkit/py.typed``.)
    """
    import tomllib

    data = tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))
    assert "py.typed" in data["tool"]["setuptools"]["package-data"]["trainkit"]
    assert (ROOT / "trainkit" / "py.typed").is_file()


#: Phrases of development notes: their figures belong in benchmarks/results/lab_notes.md.
LAB_NOTE_PHRASES = ("scripts not kept", "script not kept", "development run", "(measured)")


def test_package_docstrings_hold_no_lab_notes():
    found = [
        f"{path.relative_to(ROOT)}:{number}: {line.strip()}"
        for path in sorted((ROOT / "trainkit").rglob("*.py"))
        for number, line in enumerate(path.read_text(encoding="utf-8").splitlines(), start=1)
        if any(p in line.lower() for p in LAB_NOTE_PHRASES)
    ]
    assert not found, "move these figures to benchmarks/results/lab_notes.md:\n" + "\n".join(found)
