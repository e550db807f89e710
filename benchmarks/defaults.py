"""fit's negative phase and rate against the alternatives, on small binary data sets with exact
likelihood.

For every data set, negative phase and Adam starting rate (decayed linearly to zero, as ``fit``
does), an RBM is trained by ``fit`` for ``--epochs`` passes (batch 10, mean field for the data
phase, base-rate visible biases) from each of ``--seeds``, and the exact test log-likelihood (nats
per example; median, worst and every seed) and the seconds per epoch are printed. The generated
sets are tested on their true distribution (every state with its probability: an infinite test
set); the digits on a held-out split. Per data set also: the exact full-batch gradient for
``--reference-steps`` steps (where the optimum lies), ``fit`` with nothing chosen (its defaults:
for an RBM of at most 32 visible units the small-RBM rule), the best configuration and the
defaults' gap to it. ``--timing`` instead compares the defaults' cost with plain chains' at larger
sizes.

    python benchmarks/defaults.py [--datasets ...] [--phases ...] [--rates 0.01 0.03] [--seeds 0 1 2]
                                  [--epochs 50] [--reference-steps 2000] [--tiny] [--timing]

About 35 minutes with the defaults on 2 shared cores (the exact phase of the 16-16 RBM is most of
it); ``--rates 0.001 0.003`` adds the lower rates. ``--tiny`` shrinks every data set for a smoke test.
"""

from __future__ import annotations

import argparse
import itertools
import math
import statistics
import time
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import torch
from sklearn.datasets import load_digits
from sklearn.model_selection import train_test_split

import ebm_layers as el
from ebm_layers.model.statistics import Statistics
from ebm_layers.phases.exact import binary_codes

DATA_SEED = 1234  # every data set is drawn from this seed; --seeds vary the model and the training only


@dataclass
class DataSet:
    """Training rows, and the test distribution as weighted states (weights summing to one)."""

    name: str
    train: torch.Tensor
    test_states: torch.Tensor
    test_weights: torch.Tensor
    hidden: int
    source: str
    entropy: float | None = None  # of the true distribution, when known: the best test value is -entropy


def all_states(bits: int) -> torch.Tensor:
    """Every binary vector of ``bits`` units, ``(2^bits, bits)`` float32, unit 0 the lowest bit."""
    return binary_codes(0, 2**bits, bits, dtype=torch.float32)


def from_distribution(
    name: str, states: torch.Tensor, probabilities: torch.Tensor, size: int, hidden: int, source: str
) -> DataSet:
    """Training rows drawn from an enumerated distribution; the test is the distribution itself
    (the limit of an infinite test set), so it carries no test-sampling noise."""
    g = torch.Generator().manual_seed(DATA_SEED)
    rows = torch.multinomial(probabilities.double(), size, replacement=True, generator=g)
    keep = probabilities > 0
    p = probabilities[keep].double()
    entropy = float(-(p * p.log()).sum())
    return DataSet(name, states[rows], states[keep], p / p.sum(), hidden, source, entropy)


def bars_and_stripes(size: int) -> DataSet:
    """4x4 bars and stripes: an orientation, then every row (or column) on with probability 1/2.
    30 distinct images, all-off and all-on twice as likely as the rest; most pairs of images
    differ in 4 pixels or more, with near zero probability between them: strongly multimodal."""
    lines = all_states(4)
    images = torch.cat([lines[:, :, None].expand(16, 4, 4), lines[:, None, :].expand(16, 4, 4)])
    images = images.reshape(32, 16)
    states, counts = torch.unique(images, dim=0, return_counts=True)
    return from_distribution(
        "bars-stripes", states, counts.double() / 32, size, 16,
        '"Information Theory, Inference, and Learning Algorithms", Cambridge University Press, 2003',
    )  # fmt: skip


def prototypes(size: int, bits: int = 20, count: int = 8, flip: float = 0.05) -> DataSet:
    """A mixture of ``count`` random prototypes (fair bits) with independent flip noise: prototypes
    lie about ``bits / 2`` flips apart and an example about ``bits * flip`` from its own, so the
    modes are separated by regions of almost no mass: strongly multimodal."""
    g = torch.Generator().manual_seed(DATA_SEED + 1)
    centres = torch.bernoulli(torch.full((count, bits), 0.5), generator=g).double()
    states = all_states(bits).double()
    distance = states @ (1 - centres).T + (1 - states) @ centres.T  # (2^bits, count)
    log_p = distance * math.log(flip) + (bits - distance) * math.log1p(-flip)
    probabilities = torch.logsumexp(log_p, 1).exp() / count
    return from_distribution(
        "prototypes", states.float(), probabilities, size, 12, "generated here (common practice, no source)"
    )


def shifter(size: int, width: int = 8, rate: float = 0.3) -> DataSet:
    """The labelled shifter ensemble: a pattern of ``width`` bits (each on with probability
    ``rate``), its copy shifted cyclically by -1, 0 or +1, and the shift as a one-hot label of 3
    units. Three label modes, and third-order structure between the two patterns."""
    patterns = all_states(width)
    on = patterns.sum(1)
    p_pattern = rate**on * (1 - rate) ** (width - on)
    states = torch.cat(
        [torch.cat([patterns, patterns.roll(s, 1), torch.eye(3)[k].expand(len(patterns), 3)], 1)
         for k, s in enumerate((-1, 0, 1))]
    )  # fmt: skip
    return from_distribution(
        "shifter", states, p_pattern.repeat(3) / 3, size, 12,
        '"A Learning Algorithm for Boltzmann Machines", Cognitive Science, 1985',
    )  # fmt: skip


DIGITS_VIEWS = {
    # name: (blocks of the 8x8 image averaged to a pixel, columns kept, threshold of 0-16, hidden)
    "digits-4x4": ((2, 2), slice(None), 6, 12),  # 2x2 blocks
    "digits-8x4": ((1, 2), slice(None), 8, 16),  # pairs of neighbouring columns
    "digits-8x6": ((1, 1), slice(1, 7), 8, 16),  # without the first and last column
    "digits-8x8": ((1, 1), slice(None), 8, 16),  # as in benchmarks/digits_rbm.py
}


def digits(name: str, tiny: bool) -> DataSet:
    """scikit-learn's bundled 8x8 digits with the 70/30 split of ``benchmarks/digits_rbm.py``, seen
    at the resolution ``name`` of ``DIGITS_VIEWS`` (16, 32, 48 or 64 pixels) and binarised at its
    threshold. Ten classes: moderately multimodal."""
    (rows, columns), kept, threshold, hidden = DIGITS_VIEWS[name]
    x, y = load_digits(return_X_y=True)
    x = x.reshape(-1, 8 // rows, rows, 8 // columns, columns).mean((2, 4))[:, :, kept]
    binary = (x.reshape(len(x), -1) >= threshold).astype(np.float32)
    train, test = (
        torch.from_numpy(part)
        for part in train_test_split(binary, test_size=0.3, random_state=0, stratify=y)[:2]
    )
    train, test = (train[:50], test[:20]) if tiny else (train, test)
    source = f"scikit-learn's bundled 8x8 digits (sklearn.datasets.load_digits) as {name[7:]}"
    return DataSet(name, train, test, torch.full((len(test),), 1.0 / len(test)), hidden, source)


@torch.no_grad()
def test_log_likelihood(model: el.EnergyModel, data: DataSet) -> float:
    """Exact expected log-likelihood of the test distribution, nats per example (float64)."""
    return float((data.test_weights * el.exact_log_likelihood(model, data.test_states)).sum())


class EnumeratedStatistics(el.ExactStatistics):
    """``ExactStatistics`` by the same enumeration of the smaller layer, held as one matrix and done
    in float32 with a log-sum-exp (a speed-up of this script, not of the library: about 3x at
    2^16 states; float64 results agree to about 1e-6)."""

    def __init__(self, model: el.EnergyModel) -> None:
        super().__init__(model)
        self.side = 1 if model.sizes[1] <= model.sizes[0] else 0
        self.states = all_states(model.sizes[self.side])

    @torch.no_grad()
    def statistics(self, v: torch.Tensor | None = None, **kwargs) -> Statistics:
        biases = [b.detach() for b in self.model.biases()]
        weight = self.model.weights()[0].detach()
        weight = weight if self.side == 1 else weight.T  # (other side, enumerated side)
        logits = biases[1 - self.side] + self.states @ weight.T
        log_weights = self.states @ biases[self.side] + torch.nn.functional.softplus(logits).sum(1)
        p = torch.softmax(log_weights, 0)
        q = torch.sigmoid(logits)
        enumerated, other, pairs = p @ self.states, p @ q, (q * p[:, None]).T @ self.states
        visible, hidden, pair = (other, enumerated, pairs) if self.side == 1 else (enumerated, other, pairs.T)
        return Statistics({"layers.0.bias": visible, "layers.1.bias": hidden, "couplings.0.weight": pair})


Phase = Callable[[el.EnergyModel, torch.Generator, torch.Tensor], torch.nn.Module]


def persistent(sweeps: int, note: str = "") -> tuple[str, Phase]:
    """Plain persistent chains, 100 particles, ``sweeps`` sweeps per step."""
    label = f"persistent, 100 chains x {sweeps} sweep{'s' * (sweeps > 1)}{note}"
    return label, lambda m, g, x: el.PersistentSampler(m, 100, sweeps, generator=g)


def replica_exchange(replicas: int, sweeps: int = 1, note: str = "") -> tuple[str, Phase]:
    """Replica exchange towards the data's base rates, 100 particles at beta = 1."""
    label = f"replica exchange, 100 x {replicas} temperatures{f', {sweeps} sweeps' * (sweeps > 1)}{note}"
    return label, lambda m, g, x: el.ReplicaExchangeSampler(
        m, 100, sweeps, generator=g, num_replicas=replicas, data=x
    )


PHASES: dict[str, tuple[str, Phase]] = {
    "plain": persistent(1, " (fit's default beyond small RBMs)"),
    "sweeps2": persistent(2),
    "sweeps5": persistent(5),
    "re10": replica_exchange(10, note=" (fit's aid)"),
    "re4": replica_exchange(4),
    "re2": replica_exchange(2),
    "re4s2": replica_exchange(4, 2),
    "re2s2": replica_exchange(2, 2, " (fit's, small RBMs)"),
    "fast": (
        "fast weights, 100 x 1 (fit's aid: the optimizer's steps, decay 0.95)",
        lambda m, g, x: el.FastWeightsSampler(m, 100, 1, generator=g),
    ),
    "exact": ("exact model statistics (enumeration)", lambda m, g, x: EnumeratedStatistics(m)),
}


def train_once(data: DataSet, phase: str | None, rate: float | None, seed: int, epochs: int) -> tuple:
    """Train a fresh RBM with ``fit`` (``phase`` None: fit's own defaults, its rule for small RBMs);
    return the test log-likelihood, the seconds per epoch and the starting rate."""
    g = torch.Generator().manual_seed(seed)
    model = el.rbm(data.train.shape[1], data.hidden, generator=g)
    seconds, rate = fit_epochs(model, data.train, epochs, g, phase, rate)
    return test_log_likelihood(model, data), seconds, rate


def fit_epochs(
    model: el.EnergyModel,
    train: torch.Tensor,
    epochs: int,
    g: torch.Generator,
    phase: str | None,
    rate: float | None,
) -> tuple[float, float]:
    """``fit`` with the negative phase ``phase`` of PHASES at ``rate``, or with every default (None);
    return the mean seconds per epoch and the starting rate."""
    options = {}
    if phase is not None:
        negative = PHASES[phase][1](model, g, train)
        objective = el.TwoPhaseObjective(model, el.MeanField(model, init="bottom-up"), negative)
        optimizer, scheduler = el.default_optimizer(model, epochs, rate)
        options = dict(objective=objective, optimizer=optimizer, scheduler=scheduler)
    result = el.fit(model, train, epochs=epochs, progress=False, generator=g, **options)
    return statistics.mean(record["seconds"] for record in result.history), result.history[0]["learning_rate"]


def exact_reference(data: DataSet, seed: int, steps: int, rate: float) -> float:
    """Full-batch Adam on the exact gradient, ``steps`` steps at ``rate`` decayed linearly to zero,
    from fit's start (same initial weights, base-rate visible biases)."""
    g = torch.Generator().manual_seed(seed)
    model = el.rbm(data.train.shape[1], data.hidden, generator=g)
    model.init_visible_bias_from(data.train)
    objective = el.TwoPhaseObjective(model, el.MeanField(model), EnumeratedStatistics(model))
    optimizer, scheduler = el.default_optimizer(model, steps, rate)
    for _ in range(steps):
        optimizer.zero_grad()
        objective(data.train).backward()
        optimizer.step()
        scheduler.step()
    return test_log_likelihood(model, data)


def timing(sizes: list[tuple[int, int]], rows: int, epochs: int) -> None:
    """Seconds per epoch of plain chains and of fit's defaults on random data, interleaved."""
    print(f"\ncost of fit's defaults against plain chains: {rows} random rows, {epochs} epochs, batch 10")
    print(f"{'RBM':>9} {'plain s/epoch':>14} {'fit s/epoch':>12} {'ratio':>6}")
    data_generator = torch.Generator().manual_seed(DATA_SEED)
    for n_v, n_h in sizes:
        train = torch.bernoulli(torch.full((rows, n_v), 0.3), generator=data_generator)
        times = {"plain": [], None: []}
        for _ in range(3):  # interleaved, so a change of machine load hits both
            for phase, row in times.items():
                g = torch.Generator().manual_seed(0)
                row.append(fit_epochs(el.rbm(n_v, n_h, generator=g), train, epochs, g, phase, None)[0])
        plain, default = (statistics.median(t) for t in times.values())
        print(f"{f'{n_v}-{n_h}':>9} {plain:>14.3f} {default:>12.3f} {default / plain:>6.2f}", flush=True)


def main() -> None:
    parser = argparse.ArgumentParser(
        description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter
    )
    parser.add_argument("--datasets", nargs="+", default=list(DATASETS), choices=[*DATASETS, *EXTRA_DATASETS])
    parser.add_argument(
        "--phases", nargs="+", default=["plain", "sweeps5", "re10", "re4", "re2s2", "fast", "exact"],
        choices=list(PHASES),
    )  # fmt: skip
    parser.add_argument("--rates", type=float, nargs="+", default=[0.01, 0.03])
    parser.add_argument("--seeds", type=int, nargs="+", default=[0, 1, 2])
    parser.add_argument("--epochs", type=int, default=50)
    parser.add_argument("--reference-steps", type=int, default=2000)
    parser.add_argument("--reference-rates", type=float, nargs="*", default=[0.01, 0.03])
    parser.add_argument("--train-size", type=int, default=None, help="training rows of the generated sets")
    parser.add_argument("--tiny", action="store_true", help="smoke test: tiny training sets")
    parser.add_argument(
        "--timing", action="store_true", help="only the defaults' cost against plain chains at larger sizes"
    )
    args = parser.parse_args()
    torch.set_num_threads(1)  # the runs are small: one thread is fastest and repeatable
    if args.timing:
        sizes = [(16, 16), (32, 100)] if args.tiny else [(16, 16), (32, 100), (32, 500), (32, 1000)]
        timing(sizes, 100 if args.tiny else 1000, 1 if args.tiny else 2)
        return
    began = time.perf_counter()
    print(f"torch {torch.__version__}, {torch.get_num_threads()} thread; {args.epochs} epochs, batch 10")
    for name in args.datasets:
        data = {**DATASETS, **EXTRA_DATASETS}[name](args.tiny, args.train_size)
        n_v = data.train.shape[1]
        print(
            f"\n{data.name}: RBM {n_v}-{data.hidden}, {len(data.train)} training rows, "
            f"test {len(data.test_states)} weighted states; source: {data.source}"
        )
        if data.entropy is not None:
            print(
                f"entropy of the true distribution {data.entropy:.3f}: "
                f"no model scores above {-data.entropy:.3f}"
            )
        for rate in args.reference_rates:
            values = [exact_reference(data, seed, args.reference_steps, rate) for seed in args.seeds]
            print(
                f"reference: exact full-batch gradient, {args.reference_steps} steps, Adam {rate}: "
                f"median {statistics.median(values):.3f} (seeds {' '.join(f'{v:.3f}' for v in values)})",
                flush=True,
            )
        print(f"{'negative phase':<70} {'rate':>6} {'median':>8} {'worst':>8} {'s/epoch':>8}  seeds")
        rows = {}
        for phase, rate in itertools.product([*args.phases, None], args.rates):
            if phase is None and rows.get(None):
                continue  # fit chooses its own rate: one row
            runs = [train_once(data, phase, rate, seed, args.epochs) for seed in args.seeds]
            values = [v for v, _, _ in runs]
            seconds = statistics.median(s for _, s, _ in runs)
            rows[phase] = rows.get(phase, []) + [(statistics.median(values), runs[0][2], seconds)]
            label = PHASES[phase][0] if phase else "fit's defaults (nothing chosen)"
            print(
                f"{label:<70} {runs[0][2]:>6g} {rows[phase][-1][0]:>8.3f} {min(values):>8.3f} "
                f"{seconds:>8.3f}  {' '.join(f'{v:.3f}' for v in values)}",
                flush=True,
            )
        best = max((value, phase, rate) for phase, row in rows.items() if phase for value, rate, _ in row)
        default, plain = rows[None][0], [seconds for *_, seconds in rows.get("plain", [])]
        cost = f", {default[2] / statistics.median(plain):.2f}x plain chains' s/epoch" if plain else ""
        print(
            f"best: {PHASES[best[1]][0]} at {best[2]:g}, {best[0]:.3f}; fit's defaults {default[0]:.3f}, "
            f"gap {best[0] - default[0]:.3f} nats (target <= 0.1){cost}"
        )
    print(f"\ntook {time.perf_counter() - began:.0f} s")


DATASETS: dict[str, Callable[[bool], DataSet]] = {
    "bars-stripes": lambda tiny, size: bars_and_stripes(50 if tiny else size or 1000),
    "prototypes": lambda tiny, size: prototypes(50 if tiny else size or 1000),
    "shifter": lambda tiny, size: shifter(50 if tiny else size or 1000),
    "digits-4x4": lambda tiny, size: digits("digits-4x4", tiny),
}
# Not in the default list: the digits at 32, 48 and 64 pixels, where the small-RBM rule ends; the
# 64 are the data of benchmarks/digits_rbm.py, for its target (run with --epochs 100).
EXTRA_DATASETS = {
    name: lambda tiny, size, name=name: digits(name, tiny)
    for name in ("digits-8x4", "digits-8x6", "digits-8x8")
}

if __name__ == "__main__":
    main()
