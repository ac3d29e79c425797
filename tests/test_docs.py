"""The README and docs/*.md point at things that exist: relative links, images, anchors and config names.

Links follow Markdown's inline form ``[text](target)`` / ``![alt](target)`` (CommonMark spec, sec. 6.3 and 6.4);
anchors follow the common practice of GitHub's heading slugs (lower case, punctuation dropped, spaces to ``-``).
"""

from __future__ import annotations

import re
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
CONFIGS = ROOT / "configs"
DOCS = [ROOT / "README.md", *sorted((ROOT / "docs").glob("*.md"))]
LINK = re.compile(r"!?\[[^\]]*\]\(([^)\s]+)\)")
# "+experiment=NAME", "+compare=NAME", "system=NAME"; placeholders such as <name> or ... are not names.
CONFIG_MENTION = re.compile(r"(?<![\w.])(\+experiment|\+compare|system)=([\w<>.]+)")
GROUP_OF = {"+experiment": "experiment", "+compare": "compare", "system": "system"}


def _ids(paths):
    return [str(p.relative_to(ROOT)) for p in paths]


def slug(heading: str) -> str:
    """GitHub's anchor for a heading (common practice, as described above)."""
    text = re.sub(r"[^\w\- ]", "", heading.strip().lower())
    return text.replace(" ", "-")


def anchors(path: Path) -> set[str]:
    return {slug(m.group(1)) for m in re.finditer(r"^#+\s+(.*)$", path.read_text(), flags=re.M)}


def test_the_docs_are_found():
    assert (ROOT / "README.md").exists() and len(DOCS) > 1, DOCS


@pytest.mark.parametrize("doc", DOCS, ids=_ids(DOCS))
def test_relative_links_and_images_resolve(doc):
    missing = []
    for target in LINK.findall(doc.read_text()):
        if re.match(r"[a-z]+://|mailto:", target):
            continue  # external: not checked offline
        file_part, _, anchor = target.partition("#")
        path = (doc.parent / file_part).resolve() if file_part else doc
        if not path.exists():
            missing.append(target)
        elif anchor and path.suffix == ".md" and anchor not in anchors(path):
            missing.append(f"{target} (no such heading)")
    assert not missing, f"{doc.relative_to(ROOT)} links to missing targets: {missing}"


@pytest.mark.parametrize("doc", DOCS, ids=_ids(DOCS))
def test_config_names_in_the_docs_are_real_files(doc):
    unknown = []
    for key, name in CONFIG_MENTION.findall(doc.read_text()):
        name = name.rstrip(".")
        if "<" in name or not name or name.startswith("."):
            continue
        if not (CONFIGS / GROUP_OF[key] / f"{name}.yaml").exists():
            unknown.append(f"{key}={name}")
    assert not unknown, f"{doc.relative_to(ROOT)} names configs that do not exist: {unknown}"


def test_the_link_checker_catches_a_broken_link(tmp_path):
    """The checks above must be able to fail: a made-up link, anchor and preset are all reported."""
    (tmp_path / "a.md").write_text("# Title here\n[x](missing.md) [y](a.md#nowhere) [z](a.md#title-here)\n")
    found = LINK.findall((tmp_path / "a.md").read_text())
    assert found == ["missing.md", "a.md#nowhere", "a.md#title-here"]
    assert anchors(tmp_path / "a.md") == {"title-here"}
    assert CONFIG_MENTION.findall("apg-train +experiment=no_such_preset system=pendulum") == [
        ("+experiment", "no_such_preset"), ("system", "pendulum")]
    assert not (CONFIGS / "experiment" / "no_such_preset.yaml").exists()
