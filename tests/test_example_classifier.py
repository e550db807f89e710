"""Smoke test of examples/pretrain_classifier.py: it runs with tiny settings and prints its table
(in a new process, as ``python`` would run it: ``run_script`` of tests/helpers.py)."""

import math
import re
from pathlib import Path

import pytest

from tests.helpers import run_script

ROOT = Path(__file__).resolve().parents[1]
ROWS = (
    "raw pixels + logistic regression",
    "frozen chain features + logistic regression",
    "fine-tuned chain + linear head",
)


@pytest.mark.slow
def test_pretrain_classifier_example_runs_and_prints_three_accuracies():
    # Source of the check: common practice, no source (a smoke test: it runs, and its numbers are sane).
    result = run_script(
        ROOT / "examples" / "pretrain_classifier.py",
        *"--epochs 1 --pretrain-epochs 1 --finetune-epochs 1 --no-progress".split(),
    )
    assert result.returncode == 0, result.stderr
    lines = result.stdout.splitlines()
    for name in ROWS:
        [line] = [line for line in lines if line.startswith(name)]
        match = re.fullmatch(r".*\|\s*(\S+)%", line)
        assert match, line
        percent = float(match.group(1))
        assert math.isfinite(percent) and 0.0 <= percent <= 100.0, line
    assert "540 test images" in result.stdout
    assert re.search(r"^elapsed: \d+ s$", result.stdout, re.M)
