"""Runs every `python` block of the worked analyses in notebooks-md/ (in order, in one namespace
per page, as a notebook session would), from a fresh folder that sees the repository's
`simulations/`; each `text` block right after a block must appear (line by line, ignoring
leading and trailing spaces) in what the block printed. The `sh` blocks are run by
cli/tests/notebooks.rs."""

import contextlib
import io
import os
import pathlib

import pytest

from conftest import REPO

PAGES = sorted(
    p for p in (REPO / "notebooks-md").glob("*.md") if "```python" in p.read_text()
)


def blocks(md: str):
    out, lines = [], iter(md.splitlines())
    for line in lines:
        if line.startswith("```"):
            lang = line[3:].strip()
            body = []
            for l in lines:
                if l.startswith("```"):
                    break
                body.append(l)
            out.append((lang, "\n".join(body)))
    return out


def test_there_is_a_python_page():
    assert PAGES, "no notebooks-md page has python blocks"


@pytest.mark.parametrize("page", PAGES, ids=[p.name for p in PAGES])
def test_python_page_runs_as_written(page, tmp_path, monkeypatch):
    (tmp_path / "simulations").symlink_to(REPO / "simulations")
    monkeypatch.chdir(tmp_path)
    bs = blocks(page.read_text())
    ns = {"__name__": "__notebook__"}
    ran = 0
    for i, (lang, body) in enumerate(bs):
        if lang != "python":
            continue
        buf = io.StringIO()
        with contextlib.redirect_stdout(buf):
            exec(compile(body, f"{page.name} block {i}", "exec"), ns)
        printed = buf.getvalue()
        if i + 1 < len(bs) and bs[i + 1][0] == "text":
            got = [p.strip() for p in printed.splitlines()]
            for line in bs[i + 1][1].splitlines():
                if line.strip():
                    assert line.strip() in got, (
                        f"{page.name}: block {i} did not print `{line.strip()}`; it printed:\n{printed}"
                    )
        ran += 1
    assert ran > 0
