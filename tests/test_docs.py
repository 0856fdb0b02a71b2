"""The documentation stays complete: every command, option and study key is documented.

Adding a command (``sweep``, ``batch``, ...), an option or a study key without
documenting it makes these tests fail, naming what is missing.
"""

from __future__ import annotations

import dataclasses
import re
from pathlib import Path

import pytest
import typer

import aoi_fix
from aoi_fix import config
from aoi_fix.cli import app

ROOT = Path(__file__).resolve().parent.parent
README = ROOT / "README.md"
PARAMETERS = ROOT / "docs" / "parameters.md"


def _text(path: Path) -> str:
    assert path.is_file(), f"{path.relative_to(ROOT)} is missing"
    return path.read_text(encoding="utf-8")


def _mentions(text: str, word: str) -> bool:
    """``word`` appears as a whole token (``--set`` is not found in ``--settings``)."""
    return re.search(rf"(?<![\w-]){re.escape(word)}(?![\w-])", text) is not None


def _commands():
    root = typer.main.get_command(app)
    return root, dict(root.commands)


def _cli_items():
    """(command, kind, text that must appear) for every command, option and argument."""
    root, commands = _commands()
    items = [("aoi-fix", "option", opt) for p in root.params if not p.hidden
             for opt in p.opts]
    for name, cmd in sorted(commands.items()):
        if getattr(cmd, "hidden", False):
            continue
        items.append((name, "command", f"aoi-fix {name}"))
        for p in cmd.params:
            if getattr(p, "hidden", False):
                continue
            if p.param_type_name == "argument":
                items.append((name, "argument", p.name.upper()))
            else:
                items.extend((name, "option", opt) for opt in p.opts)
    return items


def _study_keys():
    sections = {name: cls for name, cls in config.SECTIONS.items()}
    sections["stimuli.NAME"] = config.Stimulus
    return [(section, f.name) for section, cls in sections.items()
            for f in dataclasses.fields(cls)]


# --------------------------------------------------------------------------- (a) CLI

def test_cli_has_commands():
    _, commands = _commands()
    assert {"fixations", "convert"} <= set(commands)


@pytest.mark.parametrize("command,kind,word", _cli_items(),
                         ids=lambda v: v if isinstance(v, str) else None)
def test_cli_item_in_readme(command, kind, word):
    text = _text(README)
    if kind == "argument":
        found = _mentions(text, word) or _mentions(text.upper(), word)
    else:
        found = _mentions(text, word)
    assert found, (f"README.md does not mention the {kind} {word!r} of "
                   f"'aoi-fix {command}'; document it under Commands")


# --------------------------------------------------------------------------- (b) study keys

def _section_text(text: str, section: str) -> str | None:
    """The part of parameters.md under the heading ``## `[section]` ...``."""
    m = re.search(rf"^## .*\[{re.escape(section)}\].*$", text, flags=re.M)
    if m is None:
        return None
    nxt = text.find("\n## ", m.end())
    return text[m.end(): nxt if nxt >= 0 else len(text)]


def test_every_section_documented():
    text = _text(PARAMETERS)
    for section in list(config.SECTIONS) + ["stimuli.NAME"]:
        assert _section_text(text, section) is not None, \
            f"docs/parameters.md has no '## [{section}]' heading"


@pytest.mark.parametrize("section,key", _study_keys(), ids=lambda v: v)
def test_study_key_in_parameters(section, key):
    # the key must appear in the part of the page that belongs to its section
    part = _section_text(_text(PARAMETERS), section)
    assert part is not None, f"docs/parameters.md has no '## [{section}]' heading"
    assert f"`{key}`" in part, (f"docs/parameters.md does not document the study key "
                                f"'{section}.{key}' in its [{section}] section")


# --------------------------------------------------------------------------- (c) README

@pytest.mark.parametrize("phrase", ["make demo", "make test", "not a diagnostic device"])
def test_readme_phrases(phrase):
    assert phrase in _text(README), f"README.md lacks {phrase!r}"


def test_readme_set_up_is_two_commands():
    text = _text(README)
    m = re.search(r"^## Set up\n(.*?)(?=^## )", text, flags=re.M | re.S)
    assert m, "README.md has no '## Set up' section"
    blocks = re.findall(r"```[^\n]*\n(.*?)```", m.group(1), flags=re.S)
    assert blocks, "the Set up section has no command block"
    commands = [ln.strip() for ln in blocks[0].splitlines() if ln.strip()]
    assert commands == ["make demo", "make test"]


def test_readme_starts_with_one_paragraph():
    text = _text(README)
    body = re.sub(r"^# .*\n+", "", text, count=1)
    first = body.split("\n\n", 1)[0]
    assert first and not first.startswith(("#", "-", "*", "`", "|")), \
        "README.md must open with one paragraph stating the job"


def test_docs_pages_exist():
    for name in ("formats.md", "parameters.md", "methods.md", "cautions.md"):
        assert (ROOT / "docs" / name).is_file(), f"docs/{name} is missing"
    assert (ROOT / "DEVELOPERS.md").is_file()


# --------------------------------------------------------------------------- (d) API

@pytest.mark.parametrize("name", aoi_fix.__all__)
def test_exported_name_resolves(name):
    assert getattr(aoi_fix, name) is not None


def test_readme_api_names_are_exported():
    """Every ``aoi_fix.NAME(`` used in the README's examples is part of the public API."""
    used = set(re.findall(r"\baoi_fix\.([A-Za-z_]\w*)\s*\(", _text(README)))
    missing = sorted(used - set(aoi_fix.__all__))
    assert not missing, f"README.md uses aoi_fix.{missing[0]} which is not in __all__"
