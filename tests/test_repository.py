"""The repository's promises: README commands, CI script, packaging, and the quickstart runs.

Scripts run as ``python script.py ...`` would, each in a new process (``run_script`` of
tests/helpers.py: forked from a server that has imported torch and the library once).
"""

import json
import math
import re
from pathlib import Path

import pytest

from tests.helpers import run_script

ROOT = Path(__file__).resolve().parents[1]
TORCH_PIN = "torch==2.13.0"


def _fenced_blocks(text: str) -> list[list[str]]:
    """The lines of each fenced code block of a Markdown text, in order."""
    return [
        block.strip("\n").splitlines() for block in re.findall(r"^```[^\n]*\n(.*?)^```", text, re.M | re.S)
    ]


def test_readme_has_exactly_two_one_line_commands_first():
    blocks = _fenced_blocks((ROOT / "README.md").read_text())
    demo, tests = blocks[0], blocks[1]
    assert len(demo) == 1 and len(tests) == 1
    assert TORCH_PIN in demo[0] and "examples/parts_markings.py" in demo[0] and "pytest" not in demo[0]
    assert TORCH_PIN in tests[0] and "python -m pytest" in tests[0] and "examples/" not in tests[0]


def test_ci_runs_ruff_then_exactly_the_readme_test_command():
    test_command = _fenced_blocks((ROOT / "README.md").read_text())[1][0]
    lines = [line for line in (ROOT / ".ci" / "run").read_text().splitlines() if line and line[0] != "#"]
    assert "set -euo pipefail" in lines  # pytest's exit code 5 (no tests collected) fails CI
    assert lines.index("ruff check .") < lines.index(test_command)
    assert lines[-1] == test_command


def test_pyproject_keeps_a_torch_range():
    text = (ROOT / "pyproject.toml").read_text()
    assert '"torch>=2.2"' in text and f'"{TORCH_PIN}' not in text


def test_gitignore_covers_environments_caches_outputs_and_checkpoints():
    ignored = (ROOT / ".gitignore").read_text().splitlines()
    for pattern in (".venv/", "__pycache__/", "out/", "*.pt"):
        assert pattern in ignored


def test_custom_modules_example_runs_at_tiny_size(tmp_path):
    result = run_script(
        ROOT / "examples" / "custom_modules.py",
        *"--examples 100 --epochs 1 --hidden 8 --num-betas 20".split(),
        timeout=300,
        cwd=tmp_path,
    )
    assert result.returncode == 0, result.stderr
    assert "LowRankCoupling" in result.stdout and "held-out log-likelihood per scan" in result.stdout
    assert (tmp_path / "out" / "custom_modules_samples.png").exists()


@pytest.mark.slow
def test_grey_markings_example_runs_at_tiny_size(tmp_path):
    # Source of the check: common practice, no source (a smoke test: it runs, prints its table and
    # saves its pictures).
    result = run_script(
        ROOT / "examples" / "grey_markings.py",
        *"--examples 200 --test-examples 100 --epochs 1 --hidden 16 --betas 20 --sweeps 5".split(),
        "--no-progress",
        timeout=300,
        cwd=tmp_path,
    )
    assert result.returncode == 0, result.stderr
    for row in ("test log p(scan, type)", "accuracy, free energy", "accuracy, logistic regression"):
        assert row in result.stdout
    assert (tmp_path / "out" / "grey" / "samples_by_type.png").exists()


@pytest.mark.slow
def test_marking_sheets_example_runs_at_toy_size(tmp_path):
    # A smoke test (common practice, no source): it runs, prints its table with every model's
    # column, and saves its pictures and report.
    result = run_script(
        ROOT / "examples" / "marking_sheets.py", "--quick", "--no-progress", timeout=300, cwd=tmp_path
    )
    assert result.returncode == 0, result.stderr
    for row in ("parameters", "test log-likelihood", "reverse AIS on the same sheets", "raw pixels"):
        assert row in result.stdout
    assert "convolutional" in result.stdout and "dense, 1 hidden" in result.stdout
    out = tmp_path / "out" / "marking_sheets"
    for name in ("filters.png", "samples_convolutional.png", "training_sheets.png", "report.json"):
        assert (out / name).stat().st_size > 100, name
    report = json.loads((out / "report.json").read_text())
    numbers = [
        m[key] for m in report["models"] for key in ("log_z", "test_log_likelihood", "presence_accuracy")
    ]
    assert all(math.isfinite(number) for number in numbers)


@pytest.mark.slow
def test_small_models_example_runs_and_prints_exact_log_partition():
    result = run_script(ROOT / "examples" / "small_models.py")
    assert result.returncode == 0, result.stderr
    assert result.stdout.count("exact log partition function:") == 2
    assert "E(v, h)" in result.stdout
    assert "persistent chains after 50 sweeps vs exact" in result.stdout
    assert "did not converge" not in result.stderr
    assert "own loop, 20 epochs" in result.stdout and "fit, 20 epochs" in result.stdout


@pytest.mark.slow
def test_quickstart_trains_and_saves_samples(tmp_path):
    # A smoke test (common practice, no source): it runs as written and saves its picture.
    result = run_script(ROOT / "examples" / "quickstart.py", cwd=tmp_path)
    assert result.returncode == 0, result.stderr
    gaps = [float(line.split()[-1]) for line in result.stdout.splitlines() if line.startswith("epoch")]
    assert len(gaps) == 30 and all(math.isfinite(gap) for gap in gaps)
    assert (tmp_path / "out" / "quickstart_samples.png").stat().st_size > 100


def test_parts_markings_demo_runs_at_tiny_size(tmp_path):
    # A smoke test (common practice, no source): the demo's outputs exist and its report holds
    # finite numbers (the conservative estimate and every share included).
    out = tmp_path / "demo"
    arguments = "--epochs 1 --pretrain-epochs 1 --examples 200 --test-examples 100 --betas 20 --burn-in 5"
    demo = ROOT / "examples" / "parts_markings.py"
    result = run_script(demo, *arguments.split(), "--no-progress", "--out", str(out), timeout=180)
    assert result.returncode == 0, result.stderr
    for row in ("log-likelihood, reverse AIS", "accuracy, chain features", "share of each marking type"):
        assert row in result.stdout
    # With an AIS log Z nothing printed is a bound (Jensen's inequality, mathematics).
    assert "lower bound" not in result.stdout and "None of these is a bound" in result.stdout
    for name in ("samples.png", "filters.png", "parts_markings.pt", "report.json"):
        assert (out / name).stat().st_size > 100, name
    report = json.loads((out / "report.json").read_text())
    numbers = [value for value in report.values() if isinstance(value, (int, float))]
    numbers += [share for shares in report["shares"].values() for share in shares.values()]
    numbers += report["total_variation"].values()
    numbers.append(report["log_z_bracket"][1])
    assert len(numbers) > 20 and all(math.isfinite(number) for number in numbers)
    assert sum(report["shares"]["samples"].values()) == pytest.approx(1.0)
    assert (out / "training.png").stat().st_size > 100  # matplotlib is in the test extra
    help_text = run_script(demo, "--help").stdout
    for option in ("--epochs", "--seed", "--out", "--no-progress"):
        assert option in help_text


def run_own_loop(*arguments: str) -> list[str]:
    result = run_script(ROOT / "examples" / "own_loop.py", *arguments)
    assert result.returncode == 0, result.stderr
    return result.stdout.splitlines()


@pytest.mark.slow
def test_own_loop_example_runs_and_resumes_identically(tmp_path):
    whole = run_own_loop("--epochs", "3", "--checkpoint", str(tmp_path / "whole.pt"))
    assert "test log p" in whole[0] and (tmp_path / "whole.pt").exists()
    run_own_loop("--epochs", "2", "--checkpoint", str(tmp_path / "part.pt"))
    resumed = run_own_loop("--epochs", "3", "--checkpoint", str(tmp_path / "part.pt"), "--resume")
    assert resumed[1] == whole[3]  # epoch 3 of the resumed run is epoch 3 of the whole run
    assert resumed[2:-1] == whole[4:-1]  # and so are the samples drawn after training


def test_readme_python_examples_run(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)  # the examples write out/ files
    text = (ROOT / "README.md").read_text()
    examples = re.findall(r"^```python\n(.*?)^```", text, re.M | re.S)
    assert len(examples) >= 2
    namespace: dict = {}  # later blocks continue from earlier ones
    for example in examples:
        exec(compile(example, "README.md", "exec"), namespace)


@pytest.mark.parametrize(
    "script, arguments, expected",
    [
        ("enumeration.py", ["--visible", "8", "--hidden", "5"], "plain one-shot torch / exact_log_partition"),
        ("meanfield.py", ["--sizes", "12", "8", "6", "--batch", "4"], "GEMM roofline/call"),
        pytest.param(
            "ais.py",
            "--epochs 1 --pretrain-epochs 1 --betas 20 --repeats 1".split(),
            "reverse (low on average)",
            marks=pytest.mark.slow,
        ),
        ("ais.py", ["--speed", "--betas", "20"], "AIS / products"),
        (
            "training_step.py",
            ["--sizes", "12", "8", "--batch", "4", "--repeats", "2"],
            "objective / plain torch",
        ),
        (
            "digits_rbm.py",
            ["--seeds", "0", "--epochs", "1", "--reference-steps", "2"],
            "CD-1 in the same time",
        ),
        pytest.param(
            "defaults.py",
            "--tiny --epochs 1 --seeds 0 --rates 0.03 --phases plain re2s2 --reference-steps 2".split(),
            "best:",
            marks=pytest.mark.slow,
        ),
        (
            "sweep.py",
            "--sizes 20 10 5 --particles 10 --repeats 2".split(),
            "unit updates/s",
        ),
        (
            "training.py",
            "--examples 200 --epochs 1 --digits-epochs 1 --runs 1".split(),
            "scikit-learn",
        ),
        (
            "mixing.py",
            "--epochs 1 --pretrain-epochs 1 --examples 50 --sizes 144 8 4 --updates 3 --snapshots 2".split(),
            "median ratio",
        ),
        (
            "learning_rate.py",
            "--rates 0.01 --seeds 0 --epochs 1 --pretrain-epochs 1 --examples 60 --test-examples 20 "
            "--burn-in 2 --betas 10".split(),
            "medians over seeds",
        ),
        pytest.param(
            "distributed.py",
            "--examples 400 --sizes 20 10".split(),
            "scaling efficiency",
            marks=pytest.mark.slow,
        ),
        ("open_data.py", ["--quick"], "target 96% for the label-layer model"),
        ("convolution.py", "--size 12 --maps 2 --kernel 3 --particles 4 --repeats 1".split(), "ratio"),
        (
            "lateral.py",
            "--units 5 --chains 3 --side 4 --lattice-chains 2 --repeats 1 --rounds 1".split(),
            "lattice",
        ),
        pytest.param(
            "digits_features.py",
            "--splits 0 --epochs 1 --pretrain-epochs 1 --finetune-epochs 1 --ais-betas 10 --compare".split(),
            "fine-tuned:",
            marks=pytest.mark.slow,
        ),
    ],
)
def test_benchmarks_run_at_tiny_size(script, arguments, expected):
    # A smoke test only: benchmarks print ratios and are never timed inside the suite.
    result = run_script(ROOT / "benchmarks" / script, *arguments)
    assert result.returncode == 0, result.stderr
    assert expected in result.stdout
