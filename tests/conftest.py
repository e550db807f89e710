"""Shared fixtures: a seeded generator, small models, the binarised digits, the native kernel."""

import pytest
import torch

import ebm_layers as el
from ebm_layers.model import native
from tests.helpers import binarised_digits, make_lateral_model


@pytest.fixture
def generator() -> torch.Generator:
    return torch.Generator().manual_seed(1234)


@pytest.fixture
def native_kernel() -> None:
    """Skips a test of the native kernel where it cannot be built (no C compiler, say)."""
    if not native.available():
        pytest.skip(f"the native kernel is not available here: {native.unavailable_reason}")


@pytest.fixture
def lateral_model(generator) -> el.EnergyModel:
    model = make_lateral_model()
    model.reset_parameters(generator)
    return model


@pytest.fixture(scope="session")
def digits() -> tuple[torch.Tensor, torch.Tensor]:
    """The binarised digits split with ``train_test_split(test_size=0.3, random_state=0,
    stratify=y)``: (train, test) float32 tensors. Tests must not modify them."""
    from sklearn.model_selection import train_test_split

    x, y = binarised_digits()
    train, test = train_test_split(x, test_size=0.3, random_state=0, stratify=y)[:2]
    return torch.from_numpy(train), torch.from_numpy(test)
