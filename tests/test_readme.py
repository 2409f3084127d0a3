"""The README's Python API snippet runs as written, after the quick start (which wrote ibprep-demo/case.toml)."""

import re
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


def _snippet() -> str:
    text = (ROOT / "README.md").read_text()
    section = text[text.index("## Python API"):]
    return re.search(r"```python\n(.*?)```", section, re.S).group(1)


@pytest.mark.slow
def test_the_readme_python_snippet_runs_as_written(tmp_path, monkeypatch, capsys):
    from ibprep.io.demo import DEMO_CASE

    (tmp_path / "ibprep-demo").mkdir()
    (tmp_path / "ibprep-demo" / "case.toml").write_text(DEMO_CASE)
    monkeypatch.chdir(tmp_path)
    exec(compile(_snippet(), "README.md", "exec"), {})
    out = capsys.readouterr().out
    # The last line shows the verdict and every check that did not pass, warnings included.
    last = out.strip().splitlines()[-1]
    verdict = last.split()[0]
    assert verdict in ("pass", "warn", "fail")
    if verdict == "warn":
        assert "'warn')" in last
