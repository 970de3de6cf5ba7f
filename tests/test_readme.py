"""The README's API screen runs verbatim (the project's promise to a newcomer)."""

from __future__ import annotations

import re
from pathlib import Path

README = Path(__file__).resolve().parent.parent / "README.md"


def test_readme_api_screen_runs_verbatim(tmp_path, monkeypatch) -> None:
    blocks = re.findall(r"```python\n(.*?)```", README.read_text(encoding="utf-8"), re.S)
    assert blocks, "README.md has no python block"
    monkeypatch.chdir(tmp_path)  # it writes store/, plan/ and shards/ relative to the working folder
    namespace: dict[str, object] = {}
    exec(compile(blocks[0], str(README), "exec"), namespace)
    res = namespace["res"]
    assert res.states.shape == (5, 64) and res.top_ids.shape == (5, 5)  # as the screen's comment says
    assert (tmp_path / "store" / "manifest.json").is_file() and (tmp_path / "plan").is_dir()
