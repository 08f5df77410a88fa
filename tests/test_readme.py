"""The README's Python example runs as written (a doctest), on the shipped sample run."""

from __future__ import annotations

import doctest
import os
import re
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def test_readme_python_example(tmp_path, monkeypatch):
    text = (ROOT / "README.md").read_text()
    blocks = [b for b in re.findall(r"```python\n(.*?)```", text, flags=re.S) if ">>>" in b]
    assert blocks, "README has no doctest example"
    os.symlink(ROOT / "sample_scans", tmp_path / "sample_scans")
    os.symlink(ROOT / "configs", tmp_path / "configs")
    monkeypatch.chdir(tmp_path)
    parser = doctest.DocTestParser()
    runner = doctest.DocTestRunner(optionflags=doctest.ELLIPSIS | doctest.NORMALIZE_WHITESPACE)
    for i, block in enumerate(blocks):
        test = parser.get_doctest(block, {}, f"README block {i}", "README.md", 0)
        runner.run(test)
    result = runner.summarize(verbose=False)
    assert result.attempted > 0
    assert result.failed == 0


def test_readme_states_two_setup_commands():
    text = (ROOT / "README.md").read_text()
    bash = re.findall(r"```bash\n(.*?)```", text, flags=re.S)
    assert "isogap process sample_scans/night-01" in bash[0]
    assert bash[1].strip().endswith(".venv/bin/python -m pytest")
    ci = (ROOT / ".ci" / "run").read_text()
    assert bash[1].strip() in ci  # CI runs the README's test command verbatim
