"""The README's notebook example runs as written and says what it claims."""

from __future__ import annotations

import contextlib
import io
import re
from pathlib import Path

README = Path(__file__).resolve().parent.parent / "README.md"


def _notebook_example() -> str:
    text = README.read_text()
    match = re.search(r"<!-- notebook-example.*?-->\s*```python\n(.*?)```", text, re.S)
    assert match, "README.md lost its notebook example"
    return match.group(1)


def test_readme_notebook_example_runs_and_finds_the_shift():
    namespace: dict = {}
    out = io.StringIO()
    with contextlib.redirect_stdout(out):
        exec(compile(_notebook_example(), "README.md", "exec"), namespace)
    metrics = namespace["result"]["metrics"]
    # the example shifts a quarter of the features by 0.6 sd: a linear classifier must see it
    # (the interval's lower bound above chance) and the printed table must say so
    assert metrics["domain_classifier"]["ci"][0] > 0.5
    assert metrics["probe"]["part"]["clean"] > 0.8  # the label is the sign of a feature
    printed = out.getvalue()
    assert "domain" in printed and "so the encoder separates the domains" in printed
    assert len(printed.splitlines()) >= 5
