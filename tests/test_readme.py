"""Every Python example in the README runs as written."""

from __future__ import annotations

import re
from pathlib import Path

import pytest

README = Path(__file__).resolve().parent.parent / "README.md"
BLOCKS = re.findall(r"```python\n(.*?)```", README.read_text(encoding="utf-8"), flags=re.S)


def test_readme_has_examples() -> None:
    assert BLOCKS, "the README should show at least one Python example"


@pytest.mark.parametrize("index", range(len(BLOCKS)))
def test_readme_example_runs(
    index: int,
    capsys: pytest.CaptureFixture[str],
    tmp_path: Path,
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    monkeypatch.chdir(tmp_path)  # examples may write files
    exec(compile(BLOCKS[index], f"README.md example {index + 1}", "exec"), {})
    assert capsys.readouterr().out.strip(), "each example prints something to show"
