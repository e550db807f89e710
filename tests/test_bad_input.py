"""Bad input: every case raises a TypeError/ValueError naming the argument, and changes nothing."""

import pytest
import torch

import ebm_layers as el
from tests.helpers import assert_unchanged, snapshot


def _model() -> el.EnergyModel:
    """RBM 6-4 (float32) that the calls below act on."""
    return el.rbm(6, 4, generator=torch.Generator().manual_seed(0))


def _states(visible: torch.Tensor, hidden: torch.Tensor | None = None) -> list[torch.Tensor]:
    return [visible, torch.zeros(visible.shape[0] if visible.ndim else 1, 4) if hidden is None else hidden]


GOOD = torch.ones(2, 6)

# (id, call on a model, exception type, fragment of the message)
MODEL_CASES = [
    ("energy: states not a list", lambda m: m.energy(GOOD), TypeError, "states must be a list"),
    ("energy: wrong number of tensors", lambda m: m.energy([GOOD]), ValueError, "2 tensors"),
    ("energy: wrong width", lambda m: m.energy(_states(torch.ones(2, 5))), ValueError, "states[0]"),
    ("energy: wrong ndim", lambda m: m.energy(_states(torch.ones(6))), ValueError, "2-D"),
    ("energy: empty batch", lambda m: m.energy(_states(torch.ones(0, 6))), ValueError, "empty batch"),
    (
        "energy: integer states other than 0 and 1",
        lambda m: m.energy(_states(torch.full((2, 6), 2, dtype=torch.long))),
        ValueError,
        "must lie in [0, 1]",
    ),
    (
        "energy: complex dtype",
        lambda m: m.energy(_states(torch.ones(2, 6, dtype=torch.complex64))),
        TypeError,
        "real values",
    ),
    (
        "energy: dtype differs from model",
        lambda m: m.energy(_states(torch.ones(2, 6, dtype=torch.float64))),
        TypeError,
        "torch.float64",
    ),
    (
        "energy: NaN",
        lambda m: m.energy(_states(torch.tensor([[float("nan")] + [0.0] * 5]))),
        ValueError,
        "non-finite",
    ),
    (
        "energy: Inf",
        lambda m: m.energy(_states(torch.full((1, 6), float("inf")))),
        ValueError,
        "non-finite",
    ),
    ("energy: value above 1", lambda m: m.energy(_states(torch.full((2, 6), 2.0))), ValueError, "[0, 1]"),
    ("energy: negative value", lambda m: m.energy(_states(torch.full((2, 6), -0.5))), ValueError, "[0, 1]"),
    (
        "energy: batch sizes differ",
        lambda m: m.energy([GOOD, torch.zeros(3, 4)]),
        ValueError,
        "states[1] has batch size 3",
    ),
    (
        "conditional_input: unknown layer",
        lambda m: m.conditional_input(_states(GOOD), 2),
        ValueError,
        "layer",
    ),
    (
        "conditional_input: layer not an int",
        lambda m: m.conditional_input(_states(GOOD), "1"),
        TypeError,
        "layer",
    ),
    (
        "free_energy: wrong width",
        lambda m: m.free_energy(torch.ones(2, 4)),
        ValueError,
        "v must have 6 columns",
    ),
    (
        "marginal_free_energy: wrong width",
        lambda m: m.marginal_free_energy({1: torch.ones(2, 3)}),
        ValueError,
        "states[1] must have 4 columns",
    ),
    (
        "marginal_free_energy: unknown layer",
        lambda m: m.marginal_free_energy({2: torch.ones(2, 3)}),
        ValueError,
        "layer must be a layer index in 0..1, got 2",
    ),
    (
        "exact_log_partition: max_states not an int",
        lambda m: el.exact_log_partition(m, max_states="many"),
        TypeError,
        "max_states",
    ),
    (
        "marginal_free_energy: not a dict",
        lambda m: m.marginal_free_energy([GOOD]),
        TypeError,
        "states must be a non-empty dict",
    ),
    (
        "init_visible_bias_from: wrong width",
        lambda m: m.init_visible_bias_from(torch.ones(3, 5)),
        ValueError,
        "data",
    ),
    (
        "init_visible_bias_from: out of range",
        lambda m: m.init_visible_bias_from(torch.full((3, 6), 3.0)),
        ValueError,
        "data",
    ),
    (
        "init_visible_bias_from: NaN",
        lambda m: m.init_visible_bias_from(torch.full((3, 6), float("nan"))),
        ValueError,
        "data",
    ),
    (
        "init_visible_bias_from: pseudocount inf",
        lambda m: m.init_visible_bias_from(GOOD, pseudocount=float("inf")),
        ValueError,
        "pseudocount",
    ),
    (
        "init_visible_bias_from: pseudocount 0",
        lambda m: m.init_visible_bias_from(GOOD, pseudocount=0.0),
        ValueError,
        "pseudocount",
    ),
    (
        "exact_log_likelihood: wrong width",
        lambda m: el.exact_log_likelihood(m, torch.ones(2, 7)),
        ValueError,
        "v must have 6 columns",
    ),
    ("exact_log_partition: not a model", lambda m: el.exact_log_partition(m.layers[0]), TypeError, "model"),
    (
        "exact_log_partition: too many states",
        lambda m: el.exact_log_partition(m, max_states=8),
        ValueError,
        "2^4 = 16 states",
    ),
]


@pytest.mark.parametrize(
    "call, error, fragment", [c[1:] for c in MODEL_CASES], ids=[c[0] for c in MODEL_CASES]
)
def test_bad_call_raises_and_changes_nothing(call, error, fragment):
    model = _model()
    before = snapshot(model)
    with pytest.raises(error) as caught:
        call(model)
    assert fragment in str(caught.value)
    assert_unchanged(model, before)


# (id, constructor call, exception type, fragment of the message)
CONSTRUCTION_CASES = [
    ("BinaryLayer size 0", lambda: el.BinaryLayer(0), ValueError, "size must be positive, got 0"),
    ("BinaryLayer size negative", lambda: el.BinaryLayer(-3), ValueError, "size"),
    ("BinaryLayer size float", lambda: el.BinaryLayer(3.0), TypeError, "size must be an int"),
    ("DenseCoupling to itself", lambda: el.DenseCoupling(1, 1, 3, 3), ValueError, "a = b = 1"),
    ("DenseCoupling negative index", lambda: el.DenseCoupling(-1, 1, 3, 3), ValueError, "a must be"),
    ("DenseCoupling size 0", lambda: el.DenseCoupling(0, 1, 3, 0), ValueError, "n_b"),
    ("DenseCoupling size float", lambda: el.DenseCoupling(0, 1, 2.5, 3), TypeError, "n_a"),
    ("LateralCoupling size 0", lambda: el.LateralCoupling(0, 0), ValueError, "n must be positive"),
    ("LateralCoupling bad layer", lambda: el.LateralCoupling("0", 3), TypeError, "layer"),
    ("EnergyModel no layers", lambda: el.EnergyModel([]), ValueError, "layers"),
    (
        "EnergyModel layer of the wrong type",
        lambda: el.EnergyModel([el.BinaryLayer(2), torch.nn.Linear(2, 2)]),
        TypeError,
        "layers[1] must be a UnitLayer",
    ),
    (
        "EnergyModel unknown layer index",
        lambda: el.EnergyModel([el.BinaryLayer(2), el.BinaryLayer(3)], [el.DenseCoupling(0, 2, 2, 3)]),
        ValueError,
        "couplings[0] joins layer 2",
    ),
    (
        "EnergyModel duplicate couplings",
        lambda: el.EnergyModel(
            [el.BinaryLayer(2), el.BinaryLayer(3)],
            [el.DenseCoupling(0, 1, 2, 3), el.DenseCoupling(1, 0, 3, 2)],
        ),
        ValueError,
        "couplings[0] already joins",
    ),
    (
        "EnergyModel duplicate lateral couplings",
        lambda: el.EnergyModel([el.BinaryLayer(2)], [el.LateralCoupling(0, 2), el.LateralCoupling(0, 2)]),
        ValueError,
        "already joins",
    ),
    (
        "EnergyModel weight shape mismatch",
        lambda: el.EnergyModel([el.BinaryLayer(2), el.BinaryLayer(3)], [el.DenseCoupling(0, 1, 3, 3)]),
        ValueError,
        "couplings[0].weight has shape (3, 3)",
    ),
    (
        "EnergyModel the same layer twice",
        lambda: el.EnergyModel([layer := el.BinaryLayer(2), layer]),
        ValueError,
        "layers[1] is the same module as layers[0]",
    ),
    (
        "EnergyModel coupling of the wrong type",
        lambda: el.EnergyModel([el.BinaryLayer(2)], [torch.nn.Linear(2, 2)]),
        TypeError,
        "couplings[0]",
    ),
    (
        "EnergyModel mixed dtypes",
        lambda: el.EnergyModel(
            [el.BinaryLayer(2), el.BinaryLayer(3, dtype=torch.float64)], [el.DenseCoupling(0, 1, 2, 3)]
        ),
        TypeError,
        "dtype",
    ),
    ("dbm one layer", lambda: el.dbm(5), ValueError, "at least two layer sizes"),
    ("dbm size 0", lambda: el.dbm(5, 0, 3), ValueError, "sizes[1] must be positive"),
    ("rbm size 0", lambda: el.rbm(0, 3), ValueError, "n_visible"),
    ("rbm generator not a generator", lambda: el.rbm(3, 3, generator=1), TypeError, "generator"),
    ("exact_log_partition too large", lambda: el.exact_log_partition(el.rbm(30, 30)), ValueError, "2^30"),
    ("ExactStatistics too large", lambda: el.ExactStatistics(el.rbm(40, 26)), ValueError, "2^26"),
    (
        "free_energy of a 3-layer chain",
        lambda: el.dbm(3, 2, 2).free_energy(torch.ones(1, 3)),
        ValueError,
        "layers 1 and 2 are coupled",
    ),
    (
        "exact_log_likelihood of a chain beyond max_states",
        lambda: el.exact_log_likelihood(el.dbm(3, 2, 2), torch.ones(1, 3), max_states=2),
        ValueError,
        "more than max_states=2",
    ),
    (
        "free_energy with hidden lateral couplings",
        lambda: el.EnergyModel(
            [el.BinaryLayer(2), el.BinaryLayer(3)], [el.DenseCoupling(0, 1, 2, 3), el.LateralCoupling(1, 3)]
        ).free_energy(torch.ones(1, 2)),
        ValueError,
        "layer 1 has lateral couplings",
    ),
]


@pytest.mark.parametrize(
    "call, error, fragment", [c[1:] for c in CONSTRUCTION_CASES], ids=[c[0] for c in CONSTRUCTION_CASES]
)
def test_bad_construction_raises(call, error, fragment):
    with pytest.raises(error) as caught:
        call()
    assert fragment in str(caught.value)


def test_rejected_lateral_assignment_keeps_the_weight():
    coupling = el.LateralCoupling(0, 3)
    before = snapshot(coupling)
    with pytest.raises(ValueError, match="symmetric with a zero diagonal"):
        coupling.weight = torch.arange(9.0).reshape(3, 3)
    assert_unchanged(coupling, before)
