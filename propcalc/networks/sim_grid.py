"""The input grid a finite-width simulation of a described network uses when none is given.

A network of dense blocks needs one position. Convolutions and windowed pooling
need a grid with as many spatial dimensions as their kernels and windows, large
enough that every stride still leaves positions to pool over; the global
average over ``positions`` and attention over ``tokens`` pin the number of
positions where they sit (the mean-field rules average over exactly that many
exchangeable positions, so the simulation must too).

The rule (ours, common practice, no source): walk the blocks in order keeping
the product ``S`` of the strides per dimension. The first block that pins the
number of positions (a global average or attention) at stride ``S`` fixes the
grid there to sizes ``k`` with product equal to that number (as balanced as
possible); the input grid is ``k * S``. Without such a block, every dimension
gets ``S * m`` positions with ``m`` the smallest number that leaves at least two
positions after the last stride and covers the largest kernel or window, doubled
while the grid stays within :data:`SMALL_GRID` positions; when that is beyond the
simulation's work budget, ``m`` falls to the smallest number that gives every
pooling window distinct positions. Input positions are
exchangeable and convolutions pad circularly, so the law at one position does
not depend on the grid's size: a larger grid only adds positions to average over.
"""

from __future__ import annotations

import math

from .blocks import Attention, Block, Convolution, Network, Pooling, Repeat, Residual

__all__ = ["SMALL_GRID", "MAX_GRID_SIZE", "default_grid"]

#: The grid without a pinning block grows (doubling every size) while it has at most this many
#: positions.
SMALL_GRID = 64
#: Largest size of one grid dimension (the bound measure_network accepts).
MAX_GRID_SIZE = 4096


def _balanced(n: int, dims: int) -> list[int]:
    """Sizes with product ``n``, as close to each other as the divisors allow (largest first)."""
    sizes = []
    rest = n
    for left in range(dims, 1, -1):
        target = round(rest ** (1.0 / left))
        best = 1
        for d in range(1, rest + 1):
            if rest % d == 0 and abs(d - target) < abs(best - target):
                best = d
        sizes.append(best)
        rest //= best
    sizes.append(rest)
    return sorted(sizes, reverse=True)


class _Walk:
    """Strides, largest kernel per dimension, and the first block that pins the positions."""

    def __init__(self) -> None:
        self.dims: int | None = None
        self.stride: list[int] = []
        self.reach: list[int] = []
        self.window: list[int] = []  # the largest pooling window, in input positions
        self.pin: tuple[int, list[int]] | None = None  # (positions, strides before the pin)
        self.total = 1  # product of the strides so far, over all dimensions

    def spatial(self, sizes: tuple[int, ...], stride: tuple[int, ...], pool: bool) -> None:
        if self.dims is None:
            self.dims = len(sizes)
            self.stride, self.reach = [1] * self.dims, [1] * self.dims
            self.window = [1] * self.dims
        if len(sizes) != self.dims:
            return  # the simulation names the mismatch when it meets the block
        for d, (k, s) in enumerate(zip(sizes, stride if len(stride) == len(sizes)
                                       else stride * len(sizes))):
            self.reach[d] = max(self.reach[d], k * self.stride[d])
            if pool:
                self.window[d] = max(self.window[d], k * self.stride[d])
            if self.stride[d] * s <= MAX_GRID_SIZE:
                self.stride[d] *= s

    def blocks(self, blocks: tuple[Block, ...]) -> None:
        for b in blocks:
            if self.pin is not None:
                return
            if isinstance(b, Repeat):
                for _ in range(min(b.times, 64)):  # strides past 4096 end the walk anyway
                    self.blocks(b.blocks)
            elif isinstance(b, Residual):
                self.blocks(b.branch)
            elif isinstance(b, Convolution):
                self.spatial(b.kernel, b.stride, False)
            elif isinstance(b, Pooling) and b.window is not None:
                self.spatial(b.window, b.stride or b.window, True)
            elif isinstance(b, Pooling):
                self.pin = (int(b.positions or 1), list(self.stride))
            elif isinstance(b, Attention):
                self.pin = (b.tokens, list(self.stride))


def default_grid(net: Network, smallest: bool = False) -> tuple[int, ...]:
    """The input grid for a simulation of ``net`` (see the module docstring).

    ``smallest``: without a pinning block, the fewest positions that still give every pooling
    window distinct positions at its resolution (a kernel wider than the grid wraps around
    circularly: its taps still have independent weights); what a simulation falls back to when
    the default grid is beyond its work budget.

    Examples
    --------
    >>> from propcalc.networks.description import network
    >>> default_grid(network({"blocks": [{"dense": {"sigma_w2": 2.0, "sigma_b2": 0.0}}]}))
    (1,)
    >>> default_grid(network({"blocks": [
    ...     {"convolution": {"sigma_w2": 2.0, "sigma_b2": 0.0, "kernel": [3, 3]}},
    ...     {"pooling": {"kind": "max", "window": [2, 2]}},
    ...     {"pooling": {"kind": "global_average", "positions": 16}}]}))
    (8, 8)
    """
    walk = _Walk()
    walk.blocks(net.blocks)
    if walk.dims is None:
        return (walk.pin[0],) if walk.pin is not None else (1,)
    if walk.pin is not None:
        positions, stride = walk.pin
        sizes = _balanced(positions, walk.dims)
        return tuple(min(MAX_GRID_SIZE, k * s) for k, s in zip(sizes, stride))
    reach = walk.window if smallest else walk.reach
    m = max([1 if smallest else 2] + [math.ceil(r / s) for r, s in zip(reach, walk.stride)])
    while not smallest and math.prod(s * 2 * m for s in walk.stride) <= SMALL_GRID:
        m *= 2
    return tuple(min(MAX_GRID_SIZE, s * m) for s in walk.stride)
