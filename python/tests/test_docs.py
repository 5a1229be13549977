"""docs/python.md's example is a real test: its ```python blocks are written to
a file and run by pytest from the repository's root, where their fixture
paths point."""

import os
import subprocess
import sys

from conftest import REPO


def python_blocks(page):
    blocks, current = [], None
    for line in page.read_text(encoding="utf-8").splitlines():
        if current is None and line.strip() == "```python":
            current = []
        elif current is not None and line.strip() == "```":
            blocks.append("\n".join(current) + "\n")
            current = None
        elif current is not None:
            current.append(line)
    return blocks


def test_the_documented_example_passes(tmp_path):
    blocks = python_blocks(REPO / "docs" / "python.md")
    assert len(blocks) == 1, "one example on the page"
    example = tmp_path / "test_documented_example.py"
    example.write_text(blocks[0], encoding="utf-8")
    out = subprocess.run(
        [sys.executable, "-m", "pytest", "-q", "-p", "no:cacheprovider", str(example)],
        cwd=REPO,
        capture_output=True,
        text=True,
        env={**os.environ, "PYTHONDONTWRITEBYTECODE": "1"},
    )
    assert out.returncode == 0, out.stdout + out.stderr
    assert "3 passed" in out.stdout, out.stdout
