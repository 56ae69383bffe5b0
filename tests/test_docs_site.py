"""The docs site builds strictly, and the two front files stay short and keep what CI and users rely on.

README.md and DEVELOPERS.md are the front door (150 lines at most each); everything else lives in the MkDocs
pages under docs/ (mkdocs.yml at the top). `mkdocs build --strict` turns every warning into a failure, and
mkdocs.yml's `validation:` makes missing pages, pages left out of the nav, broken links and broken anchors
warnings, so this build is the link check of the pages.
"""

from __future__ import annotations

import os
import re
import subprocess
import sys
import time
from pathlib import Path

import pytest
import yaml

ROOT = Path(__file__).resolve().parents[1]
README = ROOT / "README.md"
DEVELOPERS = ROOT / "DEVELOPERS.md"
DOCS = ROOT / "docs"
MAX_LINES = 150
CAUTION = "coreach is research software, not a medical device."
# pages where a person acts (drives, records, releases to a robot, runs it) and so carry the caution
PERSON_PAGES = ["index.md", "scene.md", "data.md", "own-robot.md", "release.md", "robot.md", "test-drive.md"]
LINK = re.compile(r"\]\(([^)\s]+)\)")


@pytest.fixture(scope="module")
def site(tmp_path_factory: pytest.TempPathFactory) -> Path:
    out = tmp_path_factory.mktemp("site")
    env = {**os.environ, "NO_MKDOCS_2_WARNING": "1"}  # the theme's end-of-life banner is not a build warning
    t0 = time.perf_counter()
    proc = subprocess.run([sys.executable, "-m", "mkdocs", "build", "--strict", "--site-dir", str(out)],
                          cwd=ROOT, env=env, capture_output=True, text=True, timeout=300)
    seconds = time.perf_counter() - t0
    assert proc.returncode == 0, f"mkdocs build --strict failed (exit {proc.returncode}):\n{proc.stdout}\n{proc.stderr}"
    print(f"mkdocs build --strict: {seconds:.2f} s")
    return out


def test_site_builds_strictly(site: Path) -> None:
    assert (site / "index.html").is_file()
    for page in DOCS.glob("*.md"):
        built = site / "index.html" if page.stem == "index" else site / page.stem / "index.html"
        assert built.is_file(), f"docs/{page.name} was not built"


def test_nav_lists_every_page() -> None:
    config = yaml.safe_load((ROOT / "mkdocs.yml").read_text())
    assert config["docs_dir"] == "docs" and config["theme"]["name"] == "material"

    def pages(node: object) -> list[str]:
        if isinstance(node, str):
            return [node]
        if isinstance(node, list):
            return [p for item in node for p in pages(item)]
        if isinstance(node, dict):
            return [p for value in node.values() for p in pages(value)]
        return []

    listed = pages(config["nav"])
    assert sorted(listed) == sorted(p.name for p in DOCS.glob("*.md")), "mkdocs.yml's nav must list every page once"


@pytest.mark.parametrize("path", [README, DEVELOPERS], ids=lambda p: p.name)
def test_front_files_are_short(path: Path) -> None:
    n = len(path.read_text().splitlines())
    assert n <= MAX_LINES, f"{path.name} has {n} lines (at most {MAX_LINES}): move the detail into a page under docs/"


def test_readme_keeps_the_caution_and_the_test_command() -> None:
    text = README.read_text()
    assert CAUTION in text
    for part in ("ethics review", "informed consent", "emergency stop", "speed and force limits",
                 "local regulations", "qualified professionals"):
        assert part in text, f"the README's caution lost {part!r}"
    # .ci/run and the contributor guide rely on "the README's test command"
    assert re.search(r"^make test\b", text, re.M), "README.md must show `make test` as a command"


@pytest.mark.parametrize("page", PERSON_PAGES)
def test_pages_where_a_person_acts_carry_the_caution(page: str) -> None:
    text = (DOCS / page).read_text()
    assert CAUTION in text and "informed consent" in text, f"docs/{page} must carry the caution"


@pytest.mark.parametrize("path", [README, DEVELOPERS], ids=lambda p: p.name)
def test_links_from_the_front_files_resolve(path: Path, site: Path) -> None:
    """mkdocs checks links between pages; the front files sit outside docs/, so their links are checked here."""
    for target in LINK.findall(path.read_text()):
        if target.startswith(("http://", "https://", "mailto:")):
            continue
        file, _, anchor = target.partition("#")
        assert (path.parent / file).exists(), f"{path.name} links to {file}, which does not exist"
        if anchor:
            rel = Path(file).relative_to("docs")
            built = site / ("index.html" if rel.stem == "index" else f"{rel.stem}/index.html")
            assert f'id="{anchor}"' in built.read_text(), f"{path.name} links to {target}: no such anchor"
