"""Every ```python block of README.md and docs/*.md runs, so an example cannot rot.

Each block runs from the repository root (paths like ``sample_maps/...`` resolve) in a
fresh namespace; blocks of one file share nothing. A block that raises fails the test
with the file and the block's first line.
"""

import re

import pytest

from .conftest import ROOT

FENCE = re.compile(r"^```python[ \t]*\n(.*?)^```[ \t]*$", re.S | re.M)


def _blocks():
    files = [ROOT / "README.md", *sorted((ROOT / "docs").glob("*.md"))]
    out = []
    for f in files:
        text = f.read_text(encoding="utf-8")
        for m in FENCE.finditer(text):
            line = text[:m.start()].count("\n") + 2   # first line of code
            out.append(pytest.param(f, line, m.group(1), id=f"{f.name}:{line}"))
    return out


BLOCKS = _blocks()


def test_the_readme_has_python_examples():
    # the extractor itself must find the README's example, or the test below proves nothing
    assert any(p.values[0].name == "README.md" for p in BLOCKS)


def test_the_fence_pattern_finds_blocks_and_only_python_ones():
    text = "intro\n```python\nx = 1\n```\n```bash\nls\n```\n```python\ny = 2\n```\n"
    assert [m.group(1) for m in FENCE.finditer(text)] == ["x = 1\n", "y = 2\n"]


@pytest.mark.parametrize("path, line, code", BLOCKS)
def test_example_runs(path, line, code, monkeypatch, tmp_path):
    monkeypatch.chdir(ROOT)
    monkeypatch.setenv("MPLBACKEND", "Agg")
    namespace = {"__name__": f"docs_example_{path.stem}_{line}"}
    exec(compile(code, f"{path.name}:{line}", "exec"), namespace)
