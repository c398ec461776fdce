"""The README's Python example runs as written, from the top of the source tree, on the bundled demo data."""

from __future__ import annotations

import os
import re
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent


def test_readme_python_example_runs(capsys):
    text = (ROOT / "README.md").read_text()
    blocks = re.findall(r"```python\n(.*?)```", text, flags=re.S)
    assert blocks, "README has no Python example"
    here = os.getcwd()
    try:
        os.chdir(ROOT)
        for code in blocks:
            exec(compile(code, "README.md", "exec"), {"__name__": "readme"})
    finally:
        os.chdir(here)
    out = capsys.readouterr().out
    assert "dopplerkit jet-pair fit" in out and "approaching" in out
