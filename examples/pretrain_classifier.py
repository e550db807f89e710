"""Unsupervised features from a deep chain, then a digit classifier on top of them.

On scikit-learn's 8x8 digits (pixel values 0-16 binarised at >= 8; one stratified 70/30 split), this:

1. trains a 64-100-50 deep chain on the training images, without their labels, with ``el.fit``
   (greedy layer-wise pretraining from RBMs, then joint training of the whole chain);
2. fits a logistic regression on the frozen mean-field features of the chain (the marginals of
   both hidden layers, 150 numbers per image), and the same on the raw pixels for comparison;
3. fine-tunes the chain and a linear head together with cross-entropy: the gradients flow
   through the mean-field fixed point into the chain's weights.

It prints the test accuracy of each classifier. They are measured on one split of 540 test
images (one image is 0.19 points), so small differences between rows can change with the split;
``--seed`` picks another split and another chain.

    python examples/pretrain_classifier.py [--epochs 100] [--finetune-epochs 10] [--seed 0]

With the defaults it takes half a minute to a minute on 2 idle CPU cores, longer on a busy machine.
Needs scikit-learn.
"""

from __future__ import annotations

import argparse
import sys
import time

import torch
from torch import nn

import ebm_layers as el
from ebm_layers.training.pretraining import DEFAULT_PRETRAIN_EPOCHS

try:
    from sklearn.datasets import load_digits
    from sklearn.linear_model import LogisticRegression
    from sklearn.model_selection import train_test_split
except ImportError:
    sys.exit("this example needs scikit-learn: pip install scikit-learn")


def fine_tune(
    classifier: nn.Module, x: torch.Tensor, y: torch.Tensor, epochs: int, generator: torch.Generator
) -> None:
    """Train every parameter of ``classifier`` (chain and head) with cross-entropy and Adam."""
    optimizer = torch.optim.Adam(classifier.parameters(), lr=1e-3)
    classifier.train()
    for _ in range(epochs):
        for batch in torch.randperm(len(x), generator=generator).split(20):
            loss = nn.functional.cross_entropy(classifier(x[batch]), y[batch])
            optimizer.zero_grad()
            loss.backward()
            optimizer.step()


def accuracy(classifier: nn.Module, x: torch.Tensor, y: torch.Tensor) -> float:
    classifier.eval()
    with torch.no_grad():
        return (classifier(x).argmax(dim=1) == y).float().mean().item()


def main() -> None:
    parser = argparse.ArgumentParser(
        description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter
    )
    parser.add_argument("--epochs", type=int, default=100, help="joint training epochs (default 100)")
    parser.add_argument(
        "--pretrain-epochs",
        type=int,
        default=DEFAULT_PRETRAIN_EPOCHS,
        help=f"pretraining epochs per RBM (default {DEFAULT_PRETRAIN_EPOCHS})",
    )
    parser.add_argument("--finetune-epochs", type=int, default=10, help="fine-tuning epochs (default 10)")
    parser.add_argument("--seed", type=int, default=0, help="seed of the split, the chain and the shuffling")
    parser.add_argument("--no-progress", action="store_true", help="hide the training progress bars")
    args = parser.parse_args()
    began = time.perf_counter()
    g = torch.Generator().manual_seed(args.seed)

    digits = load_digits()
    pixels = (digits.data >= 8).astype("float32")
    split = train_test_split(
        pixels, digits.target, test_size=0.3, random_state=args.seed, stratify=digits.target
    )
    x_train, x_test, y_train, y_test = (torch.from_numpy(a) for a in split)

    # 1. The chain learns from the training images alone (no labels).
    chain = el.dbm(64, 100, 50, generator=g)
    el.fit(
        chain,
        x_train,
        epochs=args.epochs,
        pretrain_epochs=args.pretrain_epochs,
        progress=not args.no_progress,
        generator=g,
    )

    # 2. Logistic regression on the raw pixels, and on the frozen features of the chain.
    raw = LogisticRegression(max_iter=1000).fit(x_train.numpy(), y_train.numpy())
    extractor = el.FeatureExtractor(chain)  # marginals of layers 1 and 2: 150 features
    with torch.no_grad():
        f_train, f_test = extractor(x_train), extractor(x_test)
    frozen = LogisticRegression(max_iter=1000).fit(f_train.numpy(), y_train.numpy())

    # 3. Fine-tuning: chain and head together, the head starting from the logistic regression.
    head = nn.Linear(extractor.num_features, 10)
    with torch.no_grad():
        head.weight.copy_(torch.from_numpy(frozen.coef_))
        head.bias.copy_(torch.from_numpy(frozen.intercept_))
    classifier = nn.Sequential(extractor, head)
    fine_tune(classifier, x_train, y_train, args.finetune_epochs, g)

    rows = [
        ("raw pixels + logistic regression", raw.score(x_test.numpy(), y_test.numpy())),
        ("frozen chain features + logistic regression", frozen.score(f_test.numpy(), y_test.numpy())),
        ("fine-tuned chain + linear head", accuracy(classifier, x_test, y_test)),
    ]
    width = max(len(name) for name, _ in rows)
    print(f"\nscikit-learn's 8x8 digits, one split: {len(y_train)} training, {len(y_test)} test images")
    print(
        f"chain: {args.pretrain_epochs} pretraining epochs per RBM, {args.epochs} joint epochs; "
        f"fine-tuning: {args.finetune_epochs} epochs"
    )
    print(f"{'method':<{width}} | test accuracy")
    print(f"{'-' * width}-+--------------")
    for name, value in rows:
        print(f"{name:<{width}} | {100 * value:12.1f}%")
    print(f"elapsed: {time.perf_counter() - began:.0f} s")


if __name__ == "__main__":
    main()
