"""Exact enumeration speed, measured side by side in one run.

Compares ``exact_log_partition`` (chunked, bounded memory) on an RBM with a plain torch
one-shot computation that holds every enumerated state at once, and with the one matrix
product that any such computation needs. Prints ratios; above 1 means ebm_layers is faster.

Run: ``python benchmarks/enumeration.py [--visible 100] [--hidden 20] [--repeats 3]``.
"""

import argparse

import torch
from timing import best_time
from torch.nn.functional import softplus

import ebm_layers as el


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--visible", type=int, default=100)
    parser.add_argument("--hidden", type=int, default=20, help="enumerated units (2^hidden states)")
    parser.add_argument("--repeats", type=int, default=3)
    args = parser.parse_args()

    model = el.rbm(args.visible, args.hidden, generator=torch.Generator().manual_seed(0))
    with torch.no_grad():
        model.couplings[0].weight.normal_(0.0, 0.5, generator=torch.Generator().manual_seed(1))
    weight = model.couplings[0].weight.detach().double()
    visible_bias, hidden_bias = (b.detach().double() for b in model.biases())
    codes = torch.arange(2**args.hidden)
    hidden = ((codes[:, None] >> torch.arange(args.hidden)) & 1).double()

    def plain() -> torch.Tensor:
        return torch.logsumexp(hidden @ hidden_bias + softplus(hidden @ weight.T + visible_bias).sum(-1), 0)

    def ours() -> torch.Tensor:
        with torch.no_grad():
            return el.exact_log_partition(model)

    def ours_with_gradient() -> None:
        model.zero_grad()
        el.exact_log_partition(model).backward()

    reference = plain().item()
    assert abs(reference - ours().item()) < 1e-8 * abs(reference)
    gemm = best_time(lambda: hidden @ weight.T, args.repeats)
    plain_time = best_time(plain, args.repeats)
    ours_time = best_time(ours, args.repeats)
    gradient_time = best_time(ours_with_gradient, args.repeats)
    print(
        f"RBM {args.visible}-{args.hidden}: 2^{args.hidden} = {2**args.hidden:,} enumerated states, float64"
    )
    print(f"  plain one-shot torch / exact_log_partition          {plain_time / ours_time:6.2f}")
    print(f"  its matrix product alone / exact_log_partition      {gemm / ours_time:6.2f}")
    print(f"  exact_log_partition with gradient / without         {gradient_time / ours_time:6.2f}")
    rows = el.phases.exact._CHUNK_ELEMENTS // (args.visible + args.hidden)
    plain_mib = 2**args.hidden * args.visible * 8 / 2**20
    chunk_mib = rows * args.visible * 8 / 2**20
    print(f"  memory: plain holds all {2**args.hidden:,} x {args.visible} inputs ({plain_mib:,.0f} MiB);")
    print(f"  exact_log_partition holds chunks of {rows:,} states ({chunk_mib:.1f} MiB)")


if __name__ == "__main__":
    main()
