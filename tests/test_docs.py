"""Every Python code block of README.md and docs/*.md runs as written.

Each ```python block is written to a file and run with this interpreter in a subprocess, in a fresh folder
per markdown file that holds a copy of ``examples/`` (so that ``examples/quarry_bridge.toml`` resolves and
whatever a block writes, ``runs/depot`` say, lands in the temporary folder). A block passes when it exits 0
and prints no traceback (a script that starts worker processes without ``if __name__ == "__main__":`` exits
0 after every worker has failed with one).

Two HTML comments on the line before a block change what happens to it:

* ``<!-- file: NAME.py -->``: the block is also saved as ``NAME.py`` in the folder before any later block of
  the same page runs (a module that the page imports, e.g. a user-written model);
* ``<!-- not run: REASON -->``: the block is a fragment (names defined elsewhere); it is only compiled.

Only a few blocks may be fragments (:data:`MAX_NOT_RUN`); :func:`test_blocks_counted` prints how many blocks
run and how many are compiled only.
"""

from __future__ import annotations

import os
import re
import shutil
import subprocess
import sys
from dataclasses import dataclass
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
PAGES = [ROOT / "README.md", *sorted((ROOT / "docs").glob("*.md"))]
MAX_NOT_RUN = 2
"""Fragments allowed across all pages (the executor interface in docs/scaling.md is one)."""
DEADLINE = 600.0
"""Seconds a block may take before it counts as hanging (a guard, not a timing: blocks take seconds)."""

_FENCE = re.compile(r"^```(\S*)[ \t]*$")
_MARK = re.compile(r"^<!--\s*(file|not run):\s*(.+?)\s*-->$")


@dataclass(frozen=True)
class Block:
    page: Path
    line: int  # 1-based line of the opening fence
    code: str
    mark: str  # "", "file" or "not run"
    arg: str  # the file name or the reason

    @property
    def id(self) -> str:
        return f"{self.page.relative_to(ROOT)}:{self.line}"


def blocks(page: Path) -> list[Block]:
    """The ```python blocks of a page in order, with the marker on the line before each (if any)."""
    lines = page.read_text(encoding="utf-8").splitlines()
    found: list[Block] = []
    i = 0
    while i < len(lines):
        m = _FENCE.match(lines[i])
        if not m:
            i += 1
            continue
        end = next(j for j in range(i + 1, len(lines)) if lines[j].startswith("```"))
        if m.group(1) in ("python", "py", "python3"):
            before = next((lines[j].strip() for j in range(i - 1, -1, -1) if lines[j].strip()), "")
            mark = _MARK.match(before)
            found.append(Block(page, i + 1, "\n".join(lines[i + 1 : end]) + "\n", mark.group(1) if mark else "",
                               mark.group(2) if mark else ""))  # fmt: skip
        i = end + 1
    return found


ALL = [b for page in PAGES for b in blocks(page)]


@pytest.fixture(scope="module")
def folders(tmp_path_factory: pytest.TempPathFactory) -> dict[Path, Path]:
    """One working folder per page, each with a copy of examples/."""
    out = {}
    for page in PAGES:
        d = tmp_path_factory.mktemp(page.stem)
        shutil.copytree(ROOT / "examples", d / "examples")
        out[page] = d
    return out


FRAGMENTS = [b for b in ALL if b.mark == "not run"]
RUN = [b for b in ALL if b.mark != "not run"]


@pytest.mark.parametrize("block", FRAGMENTS, ids=[b.id for b in FRAGMENTS])
def test_fragment_compiles(block: Block) -> None:
    """A block marked as a fragment (with its reason) is still valid Python."""
    compile(block.code, block.id, "exec")


@pytest.mark.parametrize("block", RUN, ids=[b.id for b in RUN])
def test_block_runs(block: Block, folders: dict[Path, Path]) -> None:
    """The block runs without error; modules it needs from the page are saved first."""
    work = folders[block.page]
    for b in blocks(block.page):
        if b.mark == "file" and b.line <= block.line:
            (work / b.arg).write_text(b.code, encoding="utf-8")
    script = work / f"block_{block.line}.py"
    script.write_text(block.code, encoding="utf-8")
    env = {**os.environ, "MPLBACKEND": "Agg"}
    proc = subprocess.run([sys.executable, script.name], cwd=work, env=env, capture_output=True, text=True,
                          timeout=DEADLINE)  # fmt: skip
    report = (f"{block.id} exited {proc.returncode}\n--- stdout\n{proc.stdout[-3000:]}\n"
              f"--- stderr\n{proc.stderr[-3000:]}")  # fmt: skip
    assert proc.returncode == 0, report
    assert "Traceback" not in proc.stderr, report


def test_blocks_counted(capsys: pytest.CaptureFixture[str]) -> None:
    """Every page's blocks are found; at most MAX_NOT_RUN are fragments, each with a reason; the counts print."""
    not_run = [b for b in ALL if b.mark == "not run"]
    files = [b for b in ALL if b.mark == "file"]
    with capsys.disabled():
        print(f"\ndocs: {len(ALL)} python blocks in {len(PAGES)} pages; {len(ALL) - len(not_run)} run, "
              f"{len(not_run)} compiled only ({', '.join(b.id for b in not_run) or 'none'})")  # fmt: skip
    assert len(ALL) >= 8  # README (2), fleet, methods, models (heater and its fleet), scaling (2)
    assert len(not_run) <= MAX_NOT_RUN and all(b.arg for b in not_run)
    assert all(re.fullmatch(r"[A-Za-z_][A-Za-z0-9_]*\.py", b.arg) for b in files)
