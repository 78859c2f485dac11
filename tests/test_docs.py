"""The README's promises and the reference docs: short README with the two set-up commands,
docs/commands.md generated from the program's own help and current, every command and
option documented, cited sources present in the repository."""

from __future__ import annotations

import importlib.util
import os
import re
from pathlib import Path

import typer

from disagg.cli import app

ROOT = Path(__file__).resolve().parents[1]
README = ROOT / "README.md"
DOCS = ROOT / "docs"
DEMO_COMMAND = ("python3 -m venv .venv && .venv/bin/pip install . && .venv/bin/disagg demo "
                "--out demo_out")
TEST_COMMAND = "scripts/test"
# A README a facilities engineer reads in five minutes (the limit).
README_MAX_BYTES = 6000


def _generator():
    spec = importlib.util.spec_from_file_location("gen_docs", ROOT / "scripts" / "gen_docs.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)  # type: ignore[union-attr]
    return module


def _commands() -> dict:
    return typer.main.get_command(app).commands  # type: ignore[attr-defined]


def test_the_readme_is_short_and_gives_the_two_set_up_commands_as_indented_lines():
    text = README.read_text(encoding="utf-8")
    assert len(text.encode("utf-8")) < README_MAX_BYTES
    lines = text.splitlines()
    assert f"    {DEMO_COMMAND}" in lines
    assert f"    {TEST_COMMAND}" in lines
    # Its prose stays readable: no table cell of hundreds of characters (the example output
    # in a fenced block keeps the program's own line lengths).
    prose = re.sub(r"```.*?```", "", text, flags=re.DOTALL).splitlines()
    assert max(len(line) for line in prose) <= 100


def test_ci_runs_exactly_the_readmes_test_command():
    ci = (ROOT / ".ci" / "run").read_text(encoding="utf-8")
    assert re.search(rf"^exec {re.escape(TEST_COMMAND)}$", ci, re.MULTILINE)
    script = ROOT / TEST_COMMAND
    assert os.access(script, os.X_OK)
    body = script.read_text(encoding="utf-8")
    # It installs what the tests need from the repository's own files, Chromium included.
    assert "pip install -q '.[test]'" in body and "apt-get install" in body
    assert "chromium" in body and "pytest" in body


def test_the_command_reference_is_current():
    generated = _generator().render()
    committed = (DOCS / "commands.md").read_text(encoding="utf-8")
    assert committed == generated, "docs/commands.md is stale: run python scripts/gen_docs.py"


def test_the_stale_check_notices_a_changed_help_text(monkeypatch):
    gen = _generator()
    group = typer.main.get_command(app)
    group.commands["check"].help += " Changed."  # type: ignore[attr-defined]
    monkeypatch.setattr(typer.main, "get_command", lambda _app: group)
    assert gen.render() != (DOCS / "commands.md").read_text(encoding="utf-8")
    assert gen.main(["--check"]) == 1


def test_every_command_and_option_is_in_the_command_reference():
    text = (DOCS / "commands.md").read_text(encoding="utf-8")
    for name, cmd in _commands().items():
        assert f"\n## disagg {name}\n" in text, name
        for p in cmd.params:
            for opt in getattr(p, "opts", []):
                if opt.startswith("-"):
                    assert f"`{opt}" in text, (name, opt)


def test_every_command_appears_in_the_guide():
    text = (DOCS / "guide.md").read_text(encoding="utf-8")
    missing = [c for c in _commands() if f"### disagg {c}" not in text]
    assert missing == []


def test_every_cited_references_section_exists_in_the_repository():
    refs = (DOCS / "references.md").read_text(encoding="utf-8")
    sections = set(re.findall(r"^## (\d+)\. ", refs, re.MULTILINE))
    cited = set()
    for folder in ("disagg", "tests", "bench"):
        for path in (ROOT / folder).rglob("*.py"):
            cited |= set(re.findall(r"docs/references\.md\s+section\s+(\d+)",
                                    path.read_text(encoding="utf-8")))
    assert cited and cited <= sections, sorted(cited - sections)
    # The sources are named in the file itself, never behind a link out of the repository.
    assert "http" not in refs


def test_links_in_the_readme_and_docs_point_at_files_in_the_repository():
    for page in [README, *DOCS.glob("*.md")]:
        for target in re.findall(r"\]\(([^)#]+)(?:#[^)]*)?\)", page.read_text(encoding="utf-8")):
            if target.startswith(("http://", "https://")):
                continue
            assert (page.parent / target).is_file(), (page.name, target)
