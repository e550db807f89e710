"""Diagnostics of what persistent chains and samples cover: the share of samples in each mode."""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass

import torch
from torch import Tensor

from ._checks import check_size

__all__ = ["ModeOccupancy", "mode_occupancy", "nearest_template"]

Assignment = Callable[[Tensor], Tensor]


def nearest_template(templates: Tensor) -> Assignment:
    """An assignment function for :func:`mode_occupancy`: each row goes to the template nearest
    to it in squared distance.

    Args:
        templates: ``(K, n)`` one template per mode (for example each mode's mean image).

    Returns:
        ``assign(x)``: ``(B, n)`` rows to ``(B,)`` int64 mode indices in ``[0, K)``.
    """
    if not isinstance(templates, Tensor) or templates.ndim != 2 or templates.shape[0] == 0:
        shape = tuple(templates.shape) if isinstance(templates, Tensor) else type(templates).__name__
        raise ValueError(f"templates must be a non-empty (K, n) tensor, got {shape}")
    templates = templates.detach()

    def assign(x: Tensor) -> Tensor:
        if x.ndim != 2 or x.shape[1] != templates.shape[1]:
            raise ValueError(f"rows must have {templates.shape[1]} columns, got shape {tuple(x.shape)}")
        return torch.cdist(x.to(templates.dtype), templates).argmin(1)

    return assign


@dataclass
class ModeOccupancy:
    """The share of samples, and of data, that an assignment function puts in each mode.

    Attributes:
        names: one name per mode.
        sample_shares: ``(K,)`` float64 shares of the samples, summing to 1.
        data_shares: ``(K,)`` float64 shares of the data, or ``None`` without data.
        num_samples, num_data: how many rows each share is over (``num_data`` is 0 without data).
    """

    names: tuple[str, ...]
    sample_shares: Tensor
    data_shares: Tensor | None
    num_samples: int
    num_data: int

    @property
    def missing(self) -> tuple[str, ...]:
        """Modes that hold data (or, without data, any mode) but no sample."""
        reference = self.data_shares if self.data_shares is not None else torch.ones_like(self.sample_shares)
        pairs = zip(self.names, self.sample_shares, reference)
        return tuple(name for name, share, expected in pairs if expected > 0 and share == 0)

    @property
    def total_variation(self) -> float | None:
        """Half the summed absolute difference of the two share vectors, in [0, 1] (``None``
        without data): 0 when samples fill the modes as the data do."""
        if self.data_shares is None:
            return None
        return 0.5 * float((self.sample_shares - self.data_shares).abs().sum())

    def __str__(self) -> str:
        width = max(len("mode"), *(len(n) for n in self.names))
        header = f"{'mode':<{width}}  {'samples':>8}"
        lines = [header + (f"  {'data':>8}" if self.data_shares is not None else "")]
        for k, name in enumerate(self.names):
            line = f"{name:<{width}}  {100 * float(self.sample_shares[k]):7.1f}%"
            if self.data_shares is not None:
                line += f"  {100 * float(self.data_shares[k]):7.1f}%"
            lines.append(line)
        summary = f"{self.num_samples} samples"
        if self.data_shares is not None:
            summary += f", {self.num_data} data rows; total variation {self.total_variation:.3f}"
        summary += "; missing modes: " + (", ".join(self.missing) if self.missing else "none")
        return "\n".join([*lines, summary])


def mode_occupancy(
    samples: Tensor,
    assign: Assignment,
    *,
    data: Tensor | None = None,
    names: Sequence[str] | None = None,
    num_modes: int | None = None,
) -> ModeOccupancy:
    """Share of ``samples`` (and of ``data``) that ``assign`` puts in each mode.

    With several modes in the data, persistent chains or a sampler that cover only some of them
    show it here: compare ``sample_shares`` with ``data_shares`` (the same assignment applied to
    the data, so that its errors affect both alike).

    Args:
        samples: ``(B, n)`` samples (visible states of particles, or anything ``assign`` takes).
        assign: maps ``(B, n)`` rows to ``(B,)`` integer modes in ``[0, K)``: for example
            :func:`nearest_template`, a trained classifier's predictions, or k-means labels.
        data: ``(N, n)`` data to compare with (optional).
        names: the modes' names (``K`` of them).
        num_modes: ``K`` when ``names`` is not given (default: largest mode seen, plus one).

    Returns:
        a :class:`ModeOccupancy`; ``str()`` of it is an aligned table.
    """
    if not callable(assign):
        raise TypeError(f"assign must be callable, got {type(assign).__name__}")
    if names is not None:
        names = tuple(str(name) for name in names)
        if num_modes is not None and num_modes != len(names):
            raise ValueError(f"num_modes={num_modes} disagrees with {len(names)} names")
        num_modes = len(names)
    elif num_modes is not None:
        num_modes = check_size("num_modes", num_modes)
    modes = {"samples": _modes("samples", samples, assign)}
    if data is not None:
        modes["data"] = _modes("data", data, assign)
    largest = max(int(m.max()) if m.numel() else -1 for m in modes.values())
    if num_modes is None:
        num_modes = largest + 1
    elif largest >= num_modes:
        raise ValueError(f"assign returned mode {largest}, outside [0, {num_modes})")
    names = names or tuple(f"mode {k}" for k in range(num_modes))
    shares = {key: torch.bincount(m, minlength=num_modes).double() / m.numel() for key, m in modes.items()}
    return ModeOccupancy(
        names=names,
        sample_shares=shares["samples"],
        data_shares=shares.get("data"),
        num_samples=modes["samples"].numel(),
        num_data=modes["data"].numel() if "data" in modes else 0,
    )


def _modes(name: str, rows: Tensor, assign: Assignment) -> Tensor:
    """``assign(rows)`` checked: ``(B,)`` non-negative int64."""
    if not isinstance(rows, Tensor) or rows.ndim != 2 or rows.shape[0] == 0:
        shape = tuple(rows.shape) if isinstance(rows, Tensor) else type(rows).__name__
        raise ValueError(f"{name} must be a non-empty (B, n) tensor, got {shape}")
    with torch.no_grad():
        modes = torch.as_tensor(assign(rows.detach()))
    if modes.shape != (rows.shape[0],) or modes.dtype.is_floating_point or modes.dtype == torch.bool:
        raise ValueError(
            f"assign must return ({rows.shape[0]},) integer modes for {name}, "
            f"got shape {tuple(modes.shape)} and dtype {modes.dtype}"
        )
    if modes.numel() and int(modes.min()) < 0:
        raise ValueError(f"assign returned a negative mode ({int(modes.min())}) for {name}")
    return modes.long()
