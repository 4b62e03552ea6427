"""The catalogue's reach: enough cases, and every command met by some of them."""

from __future__ import annotations

import test_catalogue_data
import test_catalogue_files
from hostile_workspace import Workspace

COMMANDS = ("scenes", "score", "align", "compare", "report", "layers", "demo", "explain")


def test_catalogue_has_at_least_80_cases_over_every_command(tmp_path, monkeypatch):
    cases = test_catalogue_data.CASES + test_catalogue_files.CASES
    assert len(cases) >= 80
    assert len({c.id for c in cases}) == len(cases)  # ids name the cases uniquely
    monkeypatch.chdir(tmp_path)
    seen = set()
    for i, case in enumerate(cases):
        folder = tmp_path / str(i)
        folder.mkdir()
        seen.add(str(case.build(Workspace(folder, monkeypatch))[0]))
        monkeypatch.undo()
        monkeypatch.chdir(tmp_path)
    assert set(COMMANDS) <= seen
    codes = {c.code for c in cases}
    assert {0, 1, 2, 130} <= codes
