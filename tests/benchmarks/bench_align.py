"""Alignment step time with trunk caching vs running the whole network, in one run.

Trains ResNet-18's last block (``layer4``, torchvision, random init: no download) at
128 px. With caching, a step runs only ``layer4 -> avgpool`` and the discriminator on the
frozen trunk's stored ``layer3`` activations. Two steps that run the whole network are
timed against it: the frozen trunk run forward again every step (no gradients: the
cheapest step without a cache), and the whole network trained end to end (backward
through every layer). Same batch, same loss; the variants alternate step by step so
machine noise hits all alike.

    python tests/benchmarks/bench_align.py [--batch 32] [--steps 6]

Target: cached / whole <= 0.40.
By operation count the frozen-trunk ratio is about 0.5 for ResNet-18 (layer4 is about a
quarter of the forward cost, a backward about twice a forward), the end-to-end ratio
about 0.25.
"""

from __future__ import annotations

import argparse
import statistics
import time

import torch
import torchvision
from torch import nn
from torch.nn import functional as F

from invariance import SAFETY_CAUTION
from invariance.align import DISCRIMINATOR_HIDDEN, gradient_reversal, split_module

IMAGE_SIZE = 128


def _step(tail, disc, optimizer, inputs, domain, anchor):
    feats = tail(inputs)
    logits = disc(gradient_reversal(feats, 1.0)).squeeze(1)
    loss = F.binary_cross_entropy_with_logits(logits, domain) + F.mse_loss(feats, anchor)
    optimizer.zero_grad(set_to_none=True)
    loss.backward()
    optimizer.step()


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--batch", type=int, default=32, help="images per step (half clean, half cluttered)")
    parser.add_argument("--steps", type=int, default=6, help="timed steps per variant")
    parser.add_argument("--threads", type=int, default=2)
    args = parser.parse_args(argv)
    torch.set_num_threads(args.threads)
    torch.manual_seed(0)

    net = torchvision.models.resnet18(weights=None)
    net.fc = nn.Identity()
    net.eval()
    images = torch.randn(args.batch, 3, IMAGE_SIZE, IMAGE_SIZE)
    trunk, tail, node = split_module(net, "layer4", images[:2])
    for p in trunk.parameters():
        p.requires_grad_(False)
    with torch.no_grad():
        cached = trunk(images)  # what alignment stores once per image
        anchor = tail(cached)
    disc = nn.Sequential(nn.Linear(anchor.shape[1], DISCRIMINATOR_HIDDEN), nn.ReLU(), nn.Linear(DISCRIMINATOR_HIDDEN, 1))
    optimizer = torch.optim.Adam(list(tail.parameters()) + list(disc.parameters()), lr=1e-5)
    domain = torch.cat([torch.zeros(args.batch // 2), torch.ones(args.batch - args.batch // 2)])

    def cached_step():
        _step(tail, disc, optimizer, cached, domain, anchor)

    def whole_step():
        with torch.no_grad():
            inputs = trunk(images)  # the frozen trunk again, every step
        _step(tail, disc, optimizer, inputs, domain, anchor)

    full_params = [p for p in trunk.parameters()]
    full_optimizer = torch.optim.Adam(full_params + list(tail.parameters()) + list(disc.parameters()), lr=1e-5)

    def end_to_end_step():
        for p in full_params:
            p.requires_grad_(True)
        _step(tail, disc, full_optimizer, trunk(images), domain, anchor)
        for p in full_params:
            p.requires_grad_(False)

    variants = (("cached", cached_step), ("whole", whole_step), ("end_to_end", end_to_end_step))
    times = {name: [] for name, _ in variants}
    for _ in range(2):  # warm-up: allocator and kernel selection
        for _, fn in variants:
            fn()
    for _ in range(args.steps):
        for name, fn in variants:
            start = time.perf_counter()
            fn()
            times[name].append(time.perf_counter() - start)
    cached_s, whole_s, full_s = (statistics.median(times[k]) for k in ("cached", "whole", "end_to_end"))
    print(f"resnet18 from {node} at {IMAGE_SIZE} px, batch {args.batch}, {args.threads} threads, median of {args.steps}")
    print(f"  step with trunk caching          : {cached_s * 1000:8.1f} ms")
    print(f"  step re-running the frozen trunk : {whole_s * 1000:8.1f} ms   ratio {cached_s / whole_s:.3f}")
    print(f"  step training the whole network  : {full_s * 1000:8.1f} ms   ratio {cached_s / full_s:.3f}")
    print("  (target ratio <= 0.40)")
    print(SAFETY_CAUTION)


if __name__ == "__main__":
    main()
