"""The README's Python example runs as written."""

import re
from pathlib import Path

README = Path(__file__).resolve().parents[2] / "README.md"


def test_readme_python_examples_run(capsys) -> None:
    blocks = re.findall(r"```python\n(.*?)```", README.read_text(), flags=re.S)
    assert blocks
    for block in blocks:
        exec(compile(block, "README.md", "exec"), {})  # noqa: S102
    assert "PhysicalReadout(gains=(-0.1" in capsys.readouterr().out
