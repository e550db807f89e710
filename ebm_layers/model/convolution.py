"""Convolutional couplings: images in one layer, feature maps in another, one shared filter bank."""

from __future__ import annotations

import torch
from torch import Tensor, nn
from torch.nn import functional as F
from torch.nn.utils import parametrize

from .._checks import check_count, check_index, check_size
from .._random import resolve_generator
from .couplings import INIT_STD, Coupling

__all__ = ["Conv2dCoupling", "share_bias_by_channel"]


class Conv2dCoupling(Coupling):
    r"""Filters between images in layer ``a`` and feature maps in layer ``b``, energy term
    :math:`-\sum x_b \cdot \mathrm{conv2d}(x_a, W)`.

    Layer ``a`` holds ``in_shape = (C, H, W)`` images flattened (``C * H * W`` units, channel first,
    rows top first), layer ``b`` the ``(out_channels, H', W')`` feature maps flattened, with
    ``H' = (H + 2 padding - kernel_size) // stride + 1`` (likewise ``W'``). Every feature-map unit sees
    a ``kernel_size`` square patch of every input channel through the same filter: the weight sharing
    of "Convolutional Deep Belief Networks for Scalable Unsupervised Learning of Hierarchical
    Representations" (ICML 2009); with :func:`share_bias_by_channel` the feature maps' biases are
    shared per channel too, as there. The input to ``b`` is ``conv2d(x_a, W)``, the input to ``a`` its
    adjoint ``conv_transpose2d(x_b, W)``, and the statistic the convolution's weight gradient (one
    product).

    Args:
        a, b: indices of the image layer and of the feature-map layer (``a != b``).
        in_shape: ``(C, H, W)`` of the images.
        out_channels: number of feature maps.
        kernel_size: side of the square filters.
        stride, padding: as in ``torch.nn.functional.conv2d``.
        dtype, device: factory keywords as in ``torch.nn.Conv2d``.

    Attributes:
        weight: learned ``(out_channels, C, kernel_size, kernel_size)``, initialised from N(0, 0.01^2).
        in_shape, out_shape: ``(C, H, W)`` and ``(out_channels, H', W')``.

    Examples::

        >>> coupling = Conv2dCoupling(0, 1, (1, 6, 6), out_channels=4, kernel_size=3)
        >>> coupling.out_shape, coupling.input_to(1, torch.ones(2, 36)).shape
        ((4, 4, 4), torch.Size([2, 64]))
    """

    weight: nn.Parameter

    def __init__(
        self,
        a: int,
        b: int,
        in_shape: tuple[int, int, int],
        out_channels: int,
        kernel_size: int,
        stride: int = 1,
        padding: int = 0,
        *,
        dtype: torch.dtype | None = None,
        device=None,
    ) -> None:
        super().__init__()
        self.a, self.b = check_index("a", a), check_index("b", b)
        if self.a == self.b:
            raise ValueError(f"a Conv2dCoupling joins two different layers, got a = b = {a}")
        if not isinstance(in_shape, (tuple, list)) or len(in_shape) != 3:
            raise ValueError(f"in_shape must be (channels, height, width), got {in_shape!r}")
        channels, height, width = (check_size(f"in_shape[{i}]", n) for i, n in enumerate(in_shape))
        out_channels = check_size("out_channels", out_channels)
        self.kernel_size = check_size("kernel_size", kernel_size)
        self.stride = check_size("stride", stride)
        self.padding = check_count("padding", padding)
        out_height, out_width = (
            (n + 2 * self.padding - self.kernel_size) // self.stride + 1 for n in (height, width)
        )
        if out_height < 1 or out_width < 1:
            raise ValueError(
                f"kernel_size={kernel_size} with padding={padding} does not fit images of shape "
                f"{tuple(in_shape)}"
            )
        self.in_shape = (channels, height, width)
        self.out_shape = (out_channels, out_height, out_width)
        # conv_transpose2d's output size leaves out what the stride skipped at the far edge.
        self._output_padding = tuple(
            n - ((m - 1) * self.stride - 2 * self.padding + self.kernel_size)
            for n, m in ((height, out_height), (width, out_width))
        )
        shape = (out_channels, channels, self.kernel_size, self.kernel_size)
        self.weight = nn.Parameter(torch.zeros(shape, dtype=dtype, device=device))
        self.reset_parameters()

    def reset_parameters(self, generator: torch.Generator | None = None) -> None:
        """Draw the filters from N(0, 0.01^2) with ``generator``."""
        with torch.no_grad():
            nn.init.normal_(self.weight, 0.0, INIT_STD, generator=resolve_generator(generator))

    def _maps(self, x_a: Tensor) -> Tensor:
        """``conv2d(x_a, W)`` flattened: ``(B, C H W) -> (B, out H' W')``."""
        images = x_a.reshape(-1, *self.in_shape)
        return F.conv2d(images, self.weight, stride=self.stride, padding=self.padding).flatten(1)

    def input_to(self, target: int, x: Tensor) -> Tensor:
        """``conv2d(x_a, W)`` into ``b``; its adjoint ``conv_transpose2d(x_b, W)`` into ``a``."""
        self._check_target(target)
        if target == self.b:
            return self._maps(x)
        maps = x.reshape(-1, *self.out_shape)
        images = F.conv_transpose2d(
            maps, self.weight, stride=self.stride, padding=self.padding, output_padding=self._output_padding
        )
        return images.flatten(1)

    def energy(self, x_a: Tensor, x_b: Tensor) -> Tensor:
        """``-sum x_b * conv2d(x_a, W)`` per row."""
        return -(self._maps(x_a) * x_b).sum(-1)

    def statistics(self, x_a: Tensor, x_b: Tensor, weights: Tensor | None = None) -> dict[str, Tensor]:
        """``{"weight": average of -dC/dW}``: the convolution's weight gradient with ``x_b`` as the
        output gradient, one product over the batch."""
        maps = x_b.reshape(-1, *self.out_shape)
        if weights is None:
            maps = maps / maps.shape[0]
        else:
            maps = maps * weights.to(maps.dtype).view(-1, 1, 1, 1)
        images = x_a.reshape(-1, *self.in_shape)
        gradient = torch.nn.grad.conv2d_weight(
            images, self.weight.shape, maps, stride=self.stride, padding=self.padding
        )
        return {"weight": gradient}

    def extra_repr(self) -> str:
        return (
            f"a={self.a}, b={self.b}, in_shape={self.in_shape}, out_shape={self.out_shape}, "
            f"kernel_size={self.kernel_size}, stride={self.stride}, padding={self.padding}"
        )


class _RepeatedPerChannel(nn.Module):
    """Parametrization: one value per channel, repeated over the channel's ``positions`` units."""

    def __init__(self, positions: int) -> None:
        super().__init__()
        self.positions = positions

    def forward(self, free: Tensor) -> Tensor:
        return free.repeat_interleave(self.positions)

    def right_inverse(self, tensor: Tensor) -> Tensor:
        per_channel = tensor.view(-1, self.positions)
        if not torch.equal(per_channel, per_channel[:, :1].expand_as(per_channel)):
            raise ValueError("a bias shared by channel must hold one value per channel")
        return per_channel[:, 0].clone()

    def pull_back(self, statistic: Tensor) -> Tensor:
        """The adjoint of ``forward``: a statistic summed over each channel's units."""
        return statistic.view(-1, self.positions).sum(1)


def share_bias_by_channel(layer: nn.Module, channels: int) -> nn.Module:
    """Make ``layer.bias`` (a feature-map layer's, ``channels`` maps flattened channel first) one
    learned value per channel, shared by all the channel's units (``torch.nn.utils.parametrize``:
    the free tensor is ``layer.parametrizations.bias.original``, ``(channels,)``, its statistic the
    sum over the channel). Returns ``layer``."""
    channels = check_size("channels", channels)
    bias = getattr(layer, "bias", None)
    if not isinstance(bias, Tensor) or bias.ndim != 1 or bias.numel() % channels:
        raise ValueError(f"layer must have a 1-D bias whose size is a multiple of channels={channels}")
    if parametrize.is_parametrized(layer, "bias"):
        raise ValueError("the layer's bias is parametrized already")
    positions = bias.numel() // channels
    with torch.no_grad():  # start from each channel's mean bias
        bias.copy_(bias.view(channels, positions).mean(1).repeat_interleave(positions))
    parametrize.register_parametrization(layer, "bias", _RepeatedPerChannel(positions))
    return layer
