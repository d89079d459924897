"""The documentation: a short front page, links that lead somewhere, a page per command that names its options.

The config reference's sync test lives with the schema (tests/test_config.py).
"""
from __future__ import annotations

import argparse
import re
import shlex
from pathlib import Path

import pytest

from grainwright.console.cli import COMMANDS, build_parser

ROOT = Path(__file__).resolve().parents[1]
DOCS = ROOT / "docs"
PAGES = [ROOT / "README.md", ROOT / "DEVELOPERS.md", *sorted(DOCS.glob("*.md"))]
FRONT_PAGE_MAX_LINES = 300  # the front page: job, caution, quick start, install, commands, walkthrough, links

LINK = re.compile(r"\[[^\]]*\]\(([^)\s]+)\)")


def _anchors(markdown: str) -> set[str]:
    """Heading anchors as GitHub makes them: lower case, punctuation dropped, spaces to hyphens."""
    anchors = set()
    in_code = False
    for line in markdown.splitlines():
        if line.startswith("```"):
            in_code = not in_code
        elif not in_code and line.startswith("#"):
            title = line.lstrip("#").strip().lower()
            anchors.add(re.sub(r"[^\w\- ]", "", title).replace(" ", "-"))
    return anchors


def test_readme_is_a_front_page():
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    assert len(text.splitlines()) <= FRONT_PAGE_MAX_LINES
    assert "medical or safety-critical" in text
    for heading in ("## Quick start", "## Installing", "## Commands at a glance", "## Walkthrough"):
        assert heading in text


def test_readme_quick_start_installs_and_tests_as_ci_does():
    # .ci/run is what CI runs on a clean clone; the README's install line plus its test line must be exactly that.
    ci = (ROOT / ".ci" / "run").read_text(encoding="utf-8").strip().splitlines()[-1]
    install, test = ci.rsplit(" && ", 1)
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    blocks = re.findall(r"```\n(.*?)```", readme.split("## Quick start", 1)[1].split("\n## ", 1)[0], re.DOTALL)
    lines = [line for block in blocks for line in block.splitlines() if line.strip()]
    assert lines == [install, ".venv/bin/grainwright demo", test]
    assert shlex.split(install)[-1] == ".[train,test,cluster]"


def _prose(markdown: str) -> str:
    """The text outside code blocks and inline code, where a link is a link."""
    return re.sub(r"`[^`\n]*`", "", re.sub(r"^```.*?^```", "", markdown, flags=re.DOTALL | re.MULTILINE))


@pytest.mark.parametrize("page", PAGES, ids=lambda path: str(path.relative_to(ROOT)))
def test_relative_links_lead_somewhere(page):
    text = _prose(page.read_text(encoding="utf-8"))
    for target in LINK.findall(text):
        if re.match(r"[a-z]+:", target):
            continue  # a web address
        path, _, anchor = target.partition("#")
        linked = (page.parent / path).resolve() if path else page
        assert linked.exists(), f"{page.name}: link to missing {target}"
        if anchor and linked.suffix == ".md":
            assert anchor in _anchors(linked.read_text(encoding="utf-8")), f"{page.name}: no heading for {target}"


def _option_strings(parser: argparse.ArgumentParser) -> list[tuple[str, ...]]:
    return [tuple(action.option_strings) for action in parser._actions
            if action.option_strings and action.dest != "help"]


def _sub_parsers(parser: argparse.ArgumentParser) -> dict[str, argparse.ArgumentParser]:
    return {name: sub for action in parser._actions if isinstance(action, argparse._SubParsersAction)
            for name, sub in action.choices.items()}


def _mentions(text: str, option: str) -> bool:
    return re.search(rf"(?<![\w-]){re.escape(option)}(?![\w-])", text) is not None


def test_every_command_has_a_page_naming_each_of_its_options():
    commands = _sub_parsers(build_parser())
    assert set(commands) == set(COMMANDS)
    for name, parser in commands.items():
        page = DOCS / f"{name}.md"
        assert page.is_file(), f"grainwright {name}: write docs/{name}.md"
        text = page.read_text(encoding="utf-8")
        parsers = [parser, *_sub_parsers(parser).values()]  # bench: every target on the one page
        for options in (o for p in parsers for o in _option_strings(p)):
            assert any(_mentions(text, option) for option in options), \
                f"docs/{name}.md does not mention {' / '.join(options)}"


def test_onnx_format_page_lists_every_metadata_key():
    torch = pytest.importorskip("torch")
    from grainwright.inference.images.normalization import Normalization
    from grainwright.models.export import build_metadata
    from grainwright.models.registry import build_model

    torch.manual_seed(0)
    model = build_model("residual", 1, depth=2, width=4)
    metadata = build_metadata({}, model, Normalization("uint16", 12, 0.0, 4095.0, 1), {}, Path("best.pt"))
    text = (DOCS / "onnx-format.md").read_text(encoding="utf-8")
    table = text.split("## Metadata", 1)[1]
    for key in [*metadata, "int8"]:  # int8: added to the INT8 file's copy
        assert f"`{key}`" in table, f"docs/onnx-format.md: metadata key {key} not described"
