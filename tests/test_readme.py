"""The README's Python examples run as written, in order, in a fresh interpreter.

Every fenced ``python`` block is executed unless the line before it is a
``<!-- readme-test: skip (reason) -->`` comment (for examples that need a cluster).
"""
from __future__ import annotations

import re
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
README = ROOT / "README.md"
BLOCK = re.compile(r"(?P<before>[^\n]*)\n```python\n(?P<code>.*?)```", re.S)
SKIP = re.compile(r"<!-- readme-test: skip \((?P<reason>[^)]+)\) -->")
RUN_TIMEOUT_S = 400


def readme_blocks() -> list[tuple[str, str | None]]:
    """(code, skip reason or None) for each python block, in order."""
    text = README.read_text(encoding="utf-8")
    out = []
    for match in BLOCK.finditer(text):
        skip = SKIP.search(match.group("before"))
        out.append((match.group("code"), skip.group("reason") if skip else None))
    return out


def test_readme_has_tested_python_examples_and_marks_every_skip_with_a_reason():
    blocks = readme_blocks()
    assert len([b for b in blocks if b[1] is None]) >= 5
    skipped = [reason for _, reason in blocks if reason is not None]
    assert all(reason.strip() for reason in skipped)
    text = README.read_text(encoding="utf-8")
    assert text.count("```python") == len(blocks), "a python block was not recognised"


def test_skipped_examples_still_compile():
    for code, reason in readme_blocks():
        if reason is not None:
            compile(code, "README.md", "exec")


@pytest.mark.slow
def test_readme_python_examples_run_as_written(tmp_path):
    program = "\n".join(code for code, reason in readme_blocks() if reason is None)
    script = tmp_path / "readme_examples.py"
    script.write_text(program, encoding="utf-8")
    done = subprocess.run([sys.executable, "-W", "error::UserWarning", str(script)], cwd=tmp_path,
                          capture_output=True, text=True, timeout=RUN_TIMEOUT_S)
    assert done.returncode == 0, done.stderr[-4000:]
    out = done.stdout
    # outputs the README's comments promise
    assert "torch.Size([200, 2]) torch.Size([200])" in out
    assert "torch.Size([100, 3, 2]) 10 20" in out
    assert "success rate" in out and "median smallest budget" in out
    assert "Attack results are empirical evidence" in out
    assert "a certificate holds for the sampled members and the stated ball" in out
    assert "4 True" in out
    assert "(1, 28, 28) torch.Size([1258, 784])" in out and "(1, 28, 28) 151 49 1.0" in out
    assert "SweepSummary(total=2, skipped=0, finished=2, failed=0" in out
    assert "restored: True" in out


def test_readme_pictures_exist_and_are_small():
    text = README.read_text(encoding="utf-8")
    pictures = re.findall(r"!\[[^\]]+\]\(([^)]+)\)", text)
    assert pictures, "the README shows no pictures"
    for picture in pictures:
        path = ROOT / picture
        assert path.is_file(), f"{picture} is missing"
        assert path.stat().st_size < 200_000, f"{picture} is over 200 kB"
