"""Classification on open data bundled with scikit-learn (nothing downloaded), five stratified splits.

Every part uses ``StratifiedShuffleSplit(n_splits=5, test_size=0.3, random_state=0)`` (30% of the
rows for testing, class proportions kept; the split of each index is fixed) and prints one table
with the numbers of every split and their mean ± sample standard deviation over the splits.

A. The 8x8 digits (``load_digits``) as grey levels 0-16, standardised per pixel with the mean and
   standard deviation of the training rows (a pixel whose training spread is below one grey
   level, constant ones included, is divided by one grey level instead, so that a rare stroke
   in a test image does not reach tens of standard deviations). An RBM with a ``GaussianLayer``
   visible layer (std 1) and a binary hidden layer trained by ``fit`` (its defaults, fewer
   epochs); logistic regression on its frozen ``FeatureExtractor`` features (the hidden units'
   conditional means) against logistic regression on the standardised pixels.
B. The same digits binarised (pixel > 7), the label a ``CategoricalLayer(1, 10)`` joined to the
   hidden layer (``EnergyModel(..., observed=(0, 2))``), classified by comparing free energies
   (``predict(model, x, 2).argmax(1)``) after (i) generative training (``fit``'s default objective:
   mean field and persistent chains), (ii) hybrid training (``TwoPhaseObjective`` with
   ``discriminative_layer=2``; its weight chosen by a sweep on a validation part, 20%, of the first
   split's training rows only, reported), (iii) discriminative training alone (a plain torch loop
   on ``-conditional_log_likelihood``); beside logistic regression on the pixels and an RBF
   support-vector classifier (scikit-learn defaults), and the joint test log-likelihood
   ``log p(x, y)`` of (i) and (ii) from an AIS estimate of log Z with its bracket.
C. Breast cancer (``load_breast_cancer``, 30 measurements, 2 classes), standardised: logistic
   regression on the measurements and on a Gaussian RBM's frozen features; a model with the label
   as a categorical layer (16 hidden units) after generative and hybrid training (the weight by
   the same kind of sweep), classified by free energy, with its exact joint test log-likelihood
   (log Z by enumerating the 2^16 hidden states).

Learning rate: every label-layer model trains with Adam at 0.01 decayed linearly to zero (the
rate of ``fit``'s RBMs, and its default for a model with one hidden layer and a label layer), through
``default_optimizer(model, epochs, 0.01)``. Every hyperparameter was chosen on
validation parts of the first split's training rows; no test row was looked at to choose one.
Target: 96% on the binarised digits for the label-layer model.

    python benchmarks/open_data.py [--splits 0 1 2 3 4] [--processes 2] [--quick]

About 10 minutes on 2 cores; ``--quick`` runs everything tiny on one split in a few seconds.
"""

from __future__ import annotations

import argparse
import statistics
import time
import warnings
from concurrent.futures import Future, ProcessPoolExecutor
from dataclasses import dataclass, replace
from functools import wraps

import numpy as np
import torch
from sklearn.datasets import load_breast_cancer, load_digits
from sklearn.linear_model import LogisticRegression
from sklearn.model_selection import StratifiedShuffleSplit
from sklearn.svm import SVC
from threadpoolctl import threadpool_limits

import ebm_layers as el

TEST_SIZE, VALIDATION_SIZE = 0.3, 0.2
TARGET = 0.96  # the aim for the label-layer model on the binarised digits
LEARNING_RATE = 0.01
BATCH = 10
# A pixel's standardisation divides by at least one grey level (of 16).
GREY_FLOOR = 1.0
# Seeds: 1000 * split + one of these, so every model of every split has its own generator.
SEED_OF = {
    "grey": 1,
    "generative": 2,
    "hybrid": 3,
    "discriminative": 4,
    "cancer features": 5,
    "cancer generative": 6,
    "cancer hybrid": 7,
    "ais": 8,
}


@dataclass(frozen=True)
class Settings:
    """Sizes and passes; chosen on validation parts of split 0's training rows (see README)."""

    grey_hidden: int = 200
    grey_epochs: int = 30
    digits_hidden: int = 500
    generative_epochs: int = 100
    hybrid_epochs: int = 60
    discriminative_epochs: int = 30
    weights: tuple[float, ...] = (1.0, 10.0, 100.0, 1000.0)
    # AIS on a trained 64-500-10 model of split 0 (development run): at 5,000 betas the effective
    # sample size was 3-23 of 100 and the bracket often open; at 20,000 it was 15-50, bracket 0.6-1.8
    # nats. On a 64-20-10 model it agreed with the exact value within 0.01 nats (ESS 99).
    ais_betas: int = 20_000
    cancer_features: int = 100
    cancer_hidden: int = 16
    cancer_epochs: int = 50
    cancer_weights: tuple[float, ...] = (1.0, 10.0, 100.0, 1000.0)
    rows: int | None = None  # at most this many training rows per part (None: all)


QUICK = Settings(
    grey_hidden=16,
    grey_epochs=1,
    digits_hidden=16,
    generative_epochs=1,
    hybrid_epochs=1,
    discriminative_epochs=1,
    weights=(1.0, 10.0),
    ais_betas=20,
    cancer_features=8,
    cancer_hidden=4,
    cancer_epochs=1,
    cancer_weights=(1.0, 10.0),
    rows=200,
)


# ---------------------------------------------------------------------------------------------
# Data


def split_indices(labels: np.ndarray, split: int) -> tuple[np.ndarray, np.ndarray]:
    """Training and test rows of split ``split`` (stratified, fixed seed)."""
    splitter = StratifiedShuffleSplit(n_splits=split + 1, test_size=TEST_SIZE, random_state=0)
    for index, (train, test) in enumerate(splitter.split(np.zeros(len(labels)), labels)):
        if index == split:
            return train, test
    raise AssertionError("unreachable")


def validation_indices(labels: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """A stratified validation part (``VALIDATION_SIZE``) of a training split's rows."""
    splitter = StratifiedShuffleSplit(n_splits=1, test_size=VALIDATION_SIZE, random_state=0)
    return next(splitter.split(np.zeros(len(labels)), labels))


def standardised(train: np.ndarray, test: np.ndarray, floor: float) -> tuple[torch.Tensor, torch.Tensor]:
    """Both parts centred and scaled by the training rows' statistics, per column; the scale is at
    least ``floor``, and 1 for a constant column (which becomes 0)."""
    mean, std = train.mean(0), train.std(0)
    std = np.where(std > 0, np.maximum(std, floor), 1.0)
    return tuple(torch.from_numpy(((x - mean) / std).astype(np.float32)) for x in (train, test))


@dataclass
class Part:
    """One training/test pair: inputs as tensors, labels as numpy integers."""

    x: torch.Tensor
    y: np.ndarray
    x_test: torch.Tensor
    y_test: np.ndarray


def rows_of(labels: np.ndarray, split: int, validation: bool, rows: int | None):
    """Training and test rows of ``split``; with ``validation``, the training rows without their
    validation part and that part instead of the test rows; at most ``rows`` training rows."""
    train, test = split_indices(labels, split)
    if validation:
        fitting, held_out = validation_indices(labels[train])
        train, test = train[fitting], train[held_out]
    return train[:rows], test


def digits(split: int, kind: str, validation: bool = False, rows: int | None = None) -> Part:
    """Split ``split`` of the digits, ``kind`` ``"grey"`` (standardised) or ``"binary"`` (> 7); with
    ``validation``, the validation part of its training rows stands in for the test rows."""
    x, y = load_digits(return_X_y=True)
    train, test = rows_of(y, split, validation, rows)
    if kind == "grey":
        x_train, x_test = standardised(x[train], x[test], GREY_FLOOR)
    else:
        x_train, x_test = (torch.from_numpy((x[rows] > 7).astype(np.float32)) for rows in (train, test))
    return Part(x_train, y[train], x_test, y[test])


def cancer(split: int, validation: bool = False, rows: int | None = None) -> Part:
    x, y = load_breast_cancer(return_X_y=True)
    train, test = rows_of(y, split, validation, rows)
    x_train, x_test = standardised(x[train], x[test], 0.0)
    return Part(x_train, y[train], x_test, y[test])


# ---------------------------------------------------------------------------------------------
# Models


def generator(split: int, role: str) -> torch.Generator:
    return torch.Generator().manual_seed(1000 * split + SEED_OF[role])


def gaussian_rbm(visible: int, hidden: int, g: torch.Generator) -> el.EnergyModel:
    model = el.EnergyModel(
        [el.GaussianLayer(visible), el.BinaryLayer(hidden)], [el.DenseCoupling(0, 1, visible, hidden)]
    )
    model.reset_parameters(g)
    return model


def label_model(visible: el.UnitLayer, hidden: int, classes: int, g: torch.Generator) -> el.EnergyModel:
    """``visible`` - binary hidden - ``CategoricalLayer(1, classes)``, layers 0 and 2 observed."""
    n = visible.size
    model = el.EnergyModel(
        [visible, el.BinaryLayer(hidden), el.CategoricalLayer(1, classes)],
        [el.DenseCoupling(0, 1, n, hidden), el.DenseCoupling(1, 2, hidden, classes)],
        observed=(0, 2),
    )
    model.reset_parameters(g)
    return model


def observation(model: el.EnergyModel, x: torch.Tensor, y: np.ndarray) -> tuple[torch.Tensor, torch.Tensor]:
    return x, model.layers[2].as_states(torch.from_numpy(y))


def train_label_model(model: el.EnergyModel, part: Part, epochs: int, weight: float, g: torch.Generator):
    """``fit`` at Adam 0.01 (linear decay): its default objective when ``weight`` is 0, else the same
    phases with the discriminative term of layer 2 at ``weight``. Returns the seconds taken."""
    objective = None
    if weight > 0:
        sampler = el.PersistentSampler(model, num_particles=100, generator=g)
        objective = el.TwoPhaseObjective(
            model,
            el.MeanField(model, init="bottom-up"),
            sampler,
            discriminative_layer=2,
            discriminative_weight=weight,
        )
    optimizer, scheduler = el.default_optimizer(model, epochs, LEARNING_RATE)
    start = time.perf_counter()
    el.fit(
        model,
        observation(model, part.x, part.y),
        objective=objective,
        optimizer=optimizer,
        scheduler=scheduler,
        epochs=epochs,
        progress=False,
        generator=g,
    )
    return time.perf_counter() - start


def train_discriminatively(model: el.EnergyModel, part: Part, epochs: int, g: torch.Generator) -> float:
    """Minimise the mean ``-log p(y | x)`` alone (Adam 0.01, linear decay, batches of 10)."""
    x, y = observation(model, part.x, part.y)
    model.init_visible_bias_from((x, y))  # as fit would: data means and label frequencies
    optimizer, scheduler = el.default_optimizer(model, epochs, LEARNING_RATE)
    start = time.perf_counter()
    for _ in range(epochs):
        order = torch.randperm(len(x), generator=g)
        for first in range(0, len(x), BATCH):
            rows = order[first : first + BATCH]
            loss = -el.conditional_log_likelihood(model, (x[rows], y[rows]), 2).mean()
            optimizer.zero_grad()
            loss.backward()
            optimizer.step()
        scheduler.step()
    return time.perf_counter() - start


def accuracy(model: el.EnergyModel, x: torch.Tensor, y: np.ndarray) -> float:
    """Share of rows whose label has the lowest free energy ``F(x, y)`` (exact prediction)."""
    predicted = el.predict(model, x, 2, method="exact").argmax(1).numpy()
    return float((predicted == y).mean())


@torch.no_grad()
def mean_conditional(model: el.EnergyModel, x: torch.Tensor, y: np.ndarray) -> float:
    return float(el.conditional_log_likelihood(model, observation(model, x, y), 2).mean())


def ais_log_likelihood(model: el.EnergyModel, part: Part, betas: int, g: torch.Generator) -> dict:
    """Mean test ``log p(x, y)``: exact free energy minus an AIS log Z (100 chains, ``betas``
    distributions, base rates from the training rows), and the range that log Z's bracket
    (``Estimate.lower``/``upper``: 3 standard errors) gives it."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # constant pixels: the base rates are clipped, as the warning says
        log_z = el.ais_log_partition(
            model, data=observation(model, part.x, part.y), num_betas=betas, progress=False, generator=g
        )
    value = el.log_likelihood(model, observation(model, part.x_test, part.y_test), log_z).mean
    return {
        "LL": value,
        "low": value - (log_z.upper - log_z.log_z),
        "high": value + (log_z.log_z - log_z.lower),
        "ESS": log_z.effective_sample_size,
    }


def logistic_regression(x: torch.Tensor | np.ndarray, y: np.ndarray, x_test, y_test) -> float:
    x, x_test = np.asarray(x), np.asarray(x_test)
    return float(LogisticRegression(max_iter=5000).fit(x, y).score(x_test, y_test))


@torch.no_grad()
def frozen_features(model: el.EnergyModel, part: Part) -> float:
    """Logistic regression on the hidden units' mean-field marginals (exact conditional means)."""
    extractor = el.FeatureExtractor(model)
    return logistic_regression(extractor(part.x), part.y, extractor(part.x_test), part.y_test)


# ---------------------------------------------------------------------------------------------
# Tasks (one process each; every task seeds its own generators)


def one_thread(task):
    """Run ``task`` with one torch thread and one BLAS/OpenMP thread: the processes share the cores,
    and a two-thread OpenBLAS beside other work made one logistic regression on the digits take 8 s
    instead of 0.06 s (measured on this machine)."""

    @wraps(task)
    def run(*arguments):
        torch.set_num_threads(1)
        with threadpool_limits(limits=1):
            return task(*arguments)

    return run


@one_thread
def task_grey(split: int, settings: Settings) -> dict:
    part = digits(split, "grey", rows=settings.rows)
    row = {"split": split, "LR pixels": logistic_regression(part.x, part.y, part.x_test, part.y_test)}
    g = generator(split, "grey")
    model = gaussian_rbm(64, settings.grey_hidden, g)
    start = time.perf_counter()
    el.fit(model, part.x, epochs=settings.grey_epochs, progress=False, generator=g)
    row["fit s"] = time.perf_counter() - start
    row["LR features"] = frozen_features(model, part)
    return row


@one_thread
def task_binary(split: int, settings: Settings) -> dict:
    """Anchors, generative and discriminative training of split ``split``."""
    part = digits(split, "binary", rows=settings.rows)
    row = {"split": split, "LR pixels": logistic_regression(part.x, part.y, part.x_test, part.y_test)}
    row["RBF SVC"] = float(SVC().fit(part.x.numpy(), part.y).score(part.x_test.numpy(), part.y_test))
    g = generator(split, "generative")
    model = label_model(el.BinaryLayer(64), settings.digits_hidden, 10, g)
    row["generative s"] = train_label_model(model, part, settings.generative_epochs, 0.0, g)
    row["generative"] = accuracy(model, part.x_test, part.y_test)
    row["generative LL"] = ais_log_likelihood(model, part, settings.ais_betas, generator(split, "ais"))
    g = generator(split, "discriminative")
    model = label_model(el.BinaryLayer(64), settings.digits_hidden, 10, g)
    row["discriminative s"] = train_discriminatively(model, part, settings.discriminative_epochs, g)
    row["discriminative"] = accuracy(model, part.x_test, part.y_test)
    return row


@one_thread
def task_hybrid(split: int, weight: float, settings: Settings) -> dict:
    part = digits(split, "binary", rows=settings.rows)
    g = generator(split, "hybrid")
    model = label_model(el.BinaryLayer(64), settings.digits_hidden, 10, g)
    seconds = train_label_model(model, part, settings.hybrid_epochs, weight, g)
    return {
        "hybrid": accuracy(model, part.x_test, part.y_test),
        "hybrid s": seconds,
        "hybrid LL": ais_log_likelihood(model, part, settings.ais_betas, generator(split, "ais")),
    }


@one_thread
def task_sweep(dataset: str, weight: float, settings: Settings) -> dict:
    """Hybrid training at ``weight`` on split 0's training rows without its validation part, scored
    on that part (never on test rows)."""
    if dataset == "digits":
        part, role = digits(0, "binary", validation=True, rows=settings.rows), "hybrid"
        model = label_model(el.BinaryLayer(64), settings.digits_hidden, 10, generator(0, role))
        epochs = settings.hybrid_epochs
    else:
        part, role = cancer(0, validation=True, rows=settings.rows), "cancer hybrid"
        model = label_model(el.GaussianLayer(part.x.shape[1]), settings.cancer_hidden, 2, generator(0, role))
        epochs = settings.cancer_epochs
    seconds = train_label_model(model, part, epochs, weight, generator(0, role))
    return {
        "weight": weight,
        "validation accuracy": accuracy(model, part.x_test, part.y_test),
        "validation log p(y|x)": mean_conditional(model, part.x_test, part.y_test),
        "s": seconds,
    }


@one_thread
def task_cancer(split: int, weight: float, settings: Settings) -> dict:
    part = cancer(split, rows=settings.rows)
    n = part.x.shape[1]
    row = {"split": split, "LR measurements": logistic_regression(part.x, part.y, part.x_test, part.y_test)}
    g = generator(split, "cancer features")
    model = gaussian_rbm(n, settings.cancer_features, g)
    el.fit(model, part.x, epochs=settings.cancer_epochs, progress=False, generator=g)
    row["LR features"] = frozen_features(model, part)
    for name, w in (("generative", 0.0), ("hybrid", weight)):
        g = generator(split, f"cancer {name}")
        model = label_model(el.GaussianLayer(n), settings.cancer_hidden, 2, g)
        train_label_model(model, part, settings.cancer_epochs, w, g)
        row[name] = accuracy(model, part.x_test, part.y_test)
        with torch.no_grad():  # exact: closed-form F(x, y), log Z over the hidden layer's states
            joint = el.exact_log_likelihood(model, observation(model, part.x_test, part.y_test))
        row[f"{name} LL"] = float(joint.mean())
    return row


# ---------------------------------------------------------------------------------------------
# Running and printing


class InlineExecutor:
    """``submit`` runs at once in this process (``--processes 1``: no pool to start)."""

    def submit(self, function, *arguments) -> Future:
        future: Future = Future()
        future.set_result(function(*arguments))
        return future

    def __enter__(self):
        return self

    def __exit__(self, *exc) -> None:
        return None


def chosen_weight(sweep: list[dict]) -> float:
    """Best validation accuracy; ties broken by the validation conditional log-likelihood."""
    best = max(sweep, key=lambda r: (r["validation accuracy"], r["validation log p(y|x)"]))
    return best["weight"]


def mean_std(values: list[float], scale: float = 1.0, digits_: int = 2) -> str:
    values = [scale * v for v in values]
    if len(values) < 2:
        return f"{values[0]:.{digits_}f}"
    return f"{statistics.mean(values):.{digits_}f} ± {statistics.stdev(values):.{digits_}f}"


def table(header: list[str], rows: list[list[str]]) -> None:
    """A Markdown table (readable as printed, pasted as is into the README)."""
    print("| " + " | ".join(header) + " |")
    print("|" + "---|" * len(header))
    for row in rows:
        print("| " + " | ".join(row) + " |")
    print(flush=True)


def sweep_table(rows: list[dict], seconds: str) -> None:
    """The hybrid weight sweep: validation accuracy and conditional log-likelihood per weight."""
    table(
        ["weight", "validation accuracy", "validation log p(y|x)", "s"],
        [
            [f"{r['weight']:g}", f"{100 * r['validation accuracy']:.1f}", f"{r['validation log p(y|x)']:.3f}"]
            + [format(r["s"], seconds)]
            for r in rows
        ],
    )


def percent_table(title: str, rows: list[dict], columns: list[str], extra: dict[str, str] | None = None):
    """Accuracies (and ``extra`` columns already formatted per row) per split, then mean ± std."""
    print(title)
    extra = extra or {}
    body = [
        [str(r["split"])] + [f"{100 * r[c]:.1f}" for c in columns] + [r[f"_{name}"] for name in extra]
        for r in rows
    ]
    body.append(
        ["mean ± std"]
        + [mean_std([r[c] for r in rows], 100) for c in columns]
        + [extra[name] for name in extra]
    )
    table(["split", *columns, *extra], body)


def ll_cell(result: dict) -> str:
    """The estimate, its range, the effective sample size; "open" where log Z's bracket has no lower
    end (``Estimate.flagged``: the weights spread too widely, the value is not to be trusted)."""
    high = "open" if result["high"] == float("inf") else f"{result['high']:.2f}"
    return f"{result['LL']:.2f} [{result['low']:.2f}, {high}] ESS {result['ESS']:.0f}"


def main() -> None:
    parser = argparse.ArgumentParser(
        description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter
    )
    parser.add_argument("--splits", type=int, nargs="+", default=[0, 1, 2, 3, 4])
    parser.add_argument("--processes", type=int, default=2)
    parser.add_argument("--quick", action="store_true", help="tiny everything, split 0, one process")
    parser.add_argument("--digits-hidden", type=int, help="hidden units of part B's models")
    parser.add_argument("--weights", type=float, nargs="+", help="hybrid weights swept in part B")
    args = parser.parse_args()
    settings = QUICK if args.quick else Settings()
    if args.digits_hidden is not None:
        settings = replace(settings, digits_hidden=args.digits_hidden)
    if args.weights is not None:
        settings = replace(settings, weights=tuple(args.weights))
    splits = [0] if args.quick else args.splits
    processes = 1 if args.quick else args.processes
    start = time.perf_counter()
    print(
        f"torch {torch.__version__}, {processes} process(es) of one thread each; {len(splits)} stratified "
        f"split(s), test share {TEST_SIZE}; accuracies in % on the test rows; mean ± sample std over the "
        f"splits; {settings}",
        flush=True,
    )

    with InlineExecutor() if processes == 1 else ProcessPoolExecutor(processes) as pool:
        sweeps = {
            dataset: [pool.submit(task_sweep, dataset, w, settings) for w in weights]
            for dataset, weights in (("digits", settings.weights), ("cancer", settings.cancer_weights))
        }
        grey = [pool.submit(task_grey, s, settings) for s in splits]
        binary = [pool.submit(task_binary, s, settings) for s in splits]
        sweep_rows = {dataset: [f.result() for f in futures] for dataset, futures in sweeps.items()}
        weight = {dataset: chosen_weight(rows) for dataset, rows in sweep_rows.items()}
        hybrid = [pool.submit(task_hybrid, s, weight["digits"], settings) for s in splits]
        cancer_rows = [pool.submit(task_cancer, s, weight["cancer"], settings) for s in splits]
        grey, binary = [f.result() for f in grey], [f.result() for f in binary]
        for row, future in zip(binary, hybrid):
            row.update(future.result())
        cancer_rows = [f.result() for f in cancer_rows]

    print(
        f"A. 8x8 digits, grey levels standardised: logistic regression on the pixels vs on the frozen "
        f"features of a Gaussian-binary RBM 64-{settings.grey_hidden} (fit, {settings.grey_epochs} epochs)"
    )
    for r in grey:
        r["_fit s"] = f"{r['fit s']:.0f}"
    percent_table("", grey, ["LR pixels", "LR features"], {"fit s": ""})

    print(
        "B. 8x8 digits binarised (> 7), label layer: weight sweep on split 0's validation part "
        f"({settings.hybrid_epochs} epochs, {settings.digits_hidden} hidden)"
    )
    sweep_table(sweep_rows["digits"], ".0f")
    print(f"chosen weight: {weight['digits']:g}")
    print(
        f"B. label-layer models 64-{settings.digits_hidden}-10 classified by free energy: generative "
        f"({settings.generative_epochs} epochs), hybrid (weight {weight['digits']:g}, "
        f"{settings.hybrid_epochs} epochs), discriminative ({settings.discriminative_epochs} epochs); "
        "anchors: logistic regression, RBF SVC"
    )
    columns = ["LR pixels", "RBF SVC", "generative", "hybrid", "discriminative"]
    for r in binary:
        r["_s gen/hyb/dis"] = f"{r['generative s']:.0f}/{r['hybrid s']:.0f}/{r['discriminative s']:.0f}"
    percent_table("", binary, columns, {"s gen/hyb/dis": ""})
    print(
        f"B. joint test log-likelihood log p(x, y), nats per image: exact free energy minus an AIS log Z "
        f"(100 chains, {settings.ais_betas} betas; an estimate, high on average), in brackets the range "
        "log Z's bracket (3 standard errors) allows ('open': no lower end for log Z, not to be trusted); "
        "ESS: effective sample size of 100"
    )
    table(
        ["split", "generative", "hybrid"],
        [[str(r["split"]), ll_cell(r["generative LL"]), ll_cell(r["hybrid LL"])] for r in binary]
        + [
            ["mean ± std"]
            + [mean_std([r[f"{name} LL"]["LL"] for r in binary]) for name in ("generative", "hybrid")]
        ],
    )
    hybrid_mean = statistics.mean(r["hybrid"] for r in binary)
    best = max(
        ("generative", "hybrid", "discriminative"), key=lambda c: statistics.mean(r[c] for r in binary)
    )
    best_mean = statistics.mean(r[best] for r in binary)
    print(
        f"target {100 * TARGET:.0f}% for the label-layer model: hybrid {100 * hybrid_mean:.2f}%, best "
        f"({best}) {100 * best_mean:.2f}%: {'met' if best_mean >= TARGET else 'NOT met'}\n"
    )

    print(
        f"C. breast cancer (30 measurements standardised, 2 classes): weight sweep on split 0's validation "
        f"part (30-{settings.cancer_hidden}-2, {settings.cancer_epochs} epochs)"
    )
    sweep_table(sweep_rows["cancer"], ".1f")
    print(f"chosen weight: {weight['cancer']:g}")
    print(
        f"C. logistic regression on the measurements and on a Gaussian RBM 30-{settings.cancer_features}'s "
        f"frozen features; label-layer models 30-{settings.cancer_hidden}-2 by free energy, generative "
        f"and hybrid (weight {weight['cancer']:g}); exact joint test log-likelihood log p(x, y), nats "
        "per row (log Z by enumeration)"
    )
    for r in cancer_rows:
        r["_LL generative"] = f"{r['generative LL']:.2f}"
        r["_LL hybrid"] = f"{r['hybrid LL']:.2f}"
    percent_table(
        "",
        cancer_rows,
        ["LR measurements", "LR features", "generative", "hybrid"],
        {
            "LL generative": mean_std([r["generative LL"] for r in cancer_rows]),
            "LL hybrid": mean_std([r["hybrid LL"] for r in cancer_rows]),
        },
    )
    print(f"wall time: {time.perf_counter() - start:.0f} s")


if __name__ == "__main__":
    main()
