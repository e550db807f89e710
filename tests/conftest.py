"""Shared fixtures: small models of every supported shape."""

import pytest
import torch

import ebm_layers as el


def snapshot(module: torch.nn.Module) -> dict[str, torch.Tensor]:
    """A detached copy of every parameter and buffer, to check that a rejected call changed nothing."""
    return {name: value.detach().clone() for name, value in module.state_dict().items()}


def assert_unchanged(module: torch.nn.Module, before: dict[str, torch.Tensor]) -> None:
    after = module.state_dict()
    assert after.keys() == before.keys()
    for name, value in before.items():
        assert torch.equal(after[name], value), f"{name} was modified"


@pytest.fixture
def generator() -> torch.Generator:
    return torch.Generator().manual_seed(1234)


def make_lateral_model() -> el.EnergyModel:
    """Visible layer with lateral couplings, two hidden layers attached to it (closed-form F(v))."""
    return el.EnergyModel(
        layers=[el.BinaryLayer(5), el.BinaryLayer(3), el.BinaryLayer(2)],
        couplings=[el.DenseCoupling(0, 1, 5, 3), el.LateralCoupling(0, 5), el.DenseCoupling(2, 0, 2, 5)],
    )


@pytest.fixture
def lateral_model(generator) -> el.EnergyModel:
    model = make_lateral_model()
    model.reset_parameters(generator)
    return model
