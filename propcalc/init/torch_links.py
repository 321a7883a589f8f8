"""Chains of blocks read from a traced torch graph, and how they become a description.

Every tensor that comes from the module's input is the end of a chain of *links*
from the input: one link per block (a dense layer, an activation, a residual sum...)
or per multiplication by a number. Operations that only move values (views,
reshapes, dtype casts) add no link. Chains share their beginnings, so they form a
tree rooted at the input; a sum of two tensors is a residual block when one
operand is (up to a number) an ancestor of the other: ``a x + w F(x)`` with x the
fork point, the shortcut's chain holding only numbers and the branch's chain F the
blocks after the fork.

Numbers that multiply the stream become part of a block when that is exact at
initialisation: a residual's ``weight`` or ``shortcut``, or the weight variance of
the neighbouring dense or convolution block (``W (s x) + b`` has weight variance
``s^2 sigma_w2 / fan_in``; ``s (W x + b)`` has ``s^2 sigma_w2`` and ``s^2 sigma_b2``).
Anywhere else a number has no block to go to and is refused.

No torch here: the links hold blocks of :mod:`propcalc.networks.blocks`.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from typing import Any

from ..networks.blocks import (
    Attention,
    Block,
    Convolution,
    Dense,
    Residual,
    WEIGHT_BLOCKS,
)
from .torch_ops import ModuleReadError

__all__ = ["Info", "Link", "Item", "absorb", "root", "child", "scaled", "ancestors", "fork",
           "assemble",
           "residual_link", "attention_pending"]


@dataclass(frozen=True)
class Info:
    """Where a block comes from in the module.

    Attributes
    ----------
    node : str
        The fx node whose output is the stream after the block.
    what : str
        The node in words (for messages).
    module : str or None
        Qualified name of the torch module holding the block's weights or gain.
    weight_factor, bias_factor : float
        The description's sigma_w2 (sigma_b2) over the module's own: numbers absorbed
        into the block multiply them.
    extra : tuple of (str, str)
        Other modules of the block (an attention block's projections by role).
    branch : tuple of Item
        For a residual block, the blocks of its branch.
    """

    node: str
    what: str
    module: str | None = None
    weight_factor: float = 1.0
    bias_factor: float = 1.0
    extra: tuple[tuple[str, str], ...] = ()
    branch: tuple[Item, ...] = ()


@dataclass(frozen=True)
class Item:
    """A block of the description with where it comes from."""

    block: Block
    info: Info


@dataclass(frozen=True, eq=False)
class Link:
    """One step of a chain: a block (or a number, when ``block`` is None) after ``parent``.

    ``width`` is the stream's units per position after the step (None: not known yet),
    ``grid`` the spatial sizes of the last convolution or pooling output, ``pending``
    an attention block whose output projection may still follow.
    """

    parent: Link | None
    block: Block | None
    info: Info
    scale: float = 1.0
    width: int | None = None
    grid: tuple[int, ...] = ()
    depth: int = 0
    pending: dict[str, Any] = field(default_factory=dict)


def root(node: str) -> Link:
    """The input's link."""
    return Link(None, None, Info(node, "the input"))


def child(parent: Link, block: Block, info: Info, *, width: int | None = None,
          grid: tuple[int, ...] | None = None, pending: dict[str, Any] | None = None) -> Link:
    """A block after ``parent`` (width and grid carried over unless given)."""
    return Link(parent, block, info, 1.0, parent.width if width is None else width,
                parent.grid if grid is None else grid, parent.depth + 1, pending or {})


def scaled(parent: Link, scale: float, node: str, what: str) -> Link:
    """``parent`` multiplied by the number ``scale``."""
    return Link(parent, None, Info(node, what), scale, parent.width, parent.grid,
                parent.depth + 1)


def ancestors(link: Link | None) -> list[Link]:
    """The chain from the input to ``link``, the input's link first."""
    out = []
    while link is not None:
        out.append(link)
        link = link.parent
    return out[::-1]


def fork(a: Link, b: Link) -> Link:
    """The last link the two chains share."""
    while a.depth > b.depth:
        a = a.parent  # type: ignore[assignment]
    while b.depth > a.depth:
        b = b.parent  # type: ignore[assignment]
    while a is not b:
        a, b = a.parent, b.parent  # type: ignore[assignment]
    return a


def _suffix(start: Link, end: Link) -> list[Link]:
    """The links after ``start`` up to ``end`` (``start`` an ancestor of ``end``)."""
    out = []
    link: Link | None = end
    while link is not start:
        assert link is not None
        out.append(link)
        link = link.parent
    return out[::-1]


def absorb(item: Item, s: float, before: bool, node: str) -> Item:
    """The dense or convolution item with the number s absorbed (before or after it)."""
    b = item.block
    assert isinstance(b, (Dense, Convolution))
    s2 = s * s
    if before:  # W (s x) + b
        return Item(replace(b, sigma_w2=b.sigma_w2 * s2),
                    replace(item.info, weight_factor=item.info.weight_factor * s2))
    # s (W x + b): the position's stream is now the scaled one
    return Item(replace(b, sigma_w2=b.sigma_w2 * s2, sigma_b2=b.sigma_b2 * s2),
                replace(item.info, node=node, weight_factor=item.info.weight_factor * s2,
                        bias_factor=item.info.bias_factor * s2))


def assemble(links: list[Link]) -> tuple[list[Item], float, str]:
    """The items of a chain piece, numbers absorbed into their dense or convolution
    neighbours; returns (items, trailing number, the node of the first trailing number).

    Numbers after the last block are returned, not absorbed, so that a branch can make
    them its residual weight; the caller refuses them where no block can take them.
    """
    end = len(links)
    while end > 0 and links[end - 1].block is None:
        end -= 1
    trailing, trailing_node = 1.0, ""
    for link in links[end:]:
        trailing *= link.scale
        trailing_node = trailing_node or link.info.node
    items: list[Item] = []
    pending, pending_link = 1.0, None
    for link in links[:end]:
        if link.block is None:
            if items and isinstance(items[-1].block, (Dense, Convolution)) and pending == 1.0:
                items[-1] = absorb(items[-1], link.scale, False, link.info.node)
            else:
                pending *= link.scale
                pending_link = pending_link or link
            continue
        item = Item(link.block, link.info)
        if pending != 1.0:
            if not isinstance(link.block, (Dense, Convolution)):
                assert pending_link is not None
                raise ModuleReadError(
                    pending_link.info.node, pending_link.info.what,
                    f"a multiplication by {pending:.6g} with no linear or convolution layer "
                    "next to it and not part of a residual sum: the description has no block "
                    "for it (move it next to a layer, or into a residual sum)")
            item = absorb(item, pending, True, link.info.node)
            pending, pending_link = 1.0, None
        items.append(item)
    return items, trailing, trailing_node


def _has_weights(items: list[Item]) -> bool:
    for it in items:
        if isinstance(it.block, WEIGHT_BLOCKS):
            return True
        if isinstance(it.block, Residual) and _has_weights(list(it.info.branch)):
            return True
    return False


def residual_link(a: Link, b: Link, weight_b: float, node: str, what: str) -> Link:
    """The link of ``a + weight_b * b`` as a residual block after their fork.

    One operand's chain from the fork must hold numbers only (the shortcut); the
    other's is the branch, which needs a block with fresh weights (dense, convolution
    or attention) to be independent of the shortcut at initialisation (Yang &
    Schoenholz 2017).
    """
    base = fork(a, b)
    pa, pb = _suffix(base, a), _suffix(base, b)
    only_numbers = [all(x.block is None for x in p) for p in (pa, pb)]
    if only_numbers[0] and only_numbers[1]:
        raise ModuleReadError(node, what, "a sum of the stream with a multiple of itself: the "
                                          "description has no block for it")
    if not (only_numbers[0] or only_numbers[1]):
        raise ModuleReadError(
            node, what, "neither operand of the sum is the other's shortcut: both pass through "
                        "blocks after they part (a projection on the shortcut, or two branches); "
                        "the description has residual blocks x + w F(x) with a shortcut that is "
                        "the stream itself times a number")
    if only_numbers[0]:  # a is the shortcut
        short, branch, short_scale, weight = pa, pb, 1.0, weight_b
    else:  # weight_b * b is the shortcut
        short, branch, short_scale, weight = pb, pa, weight_b, 1.0
    shortcut = short_scale
    for x in short:
        shortcut *= x.scale
    items, trailing, _ = assemble(branch)
    if not _has_weights(items):
        raise ModuleReadError(node, what, "the residual branch has no linear, convolution or "
                                          "attention layer: without fresh weights it is not "
                                          "independent of the shortcut, which the residual "
                                          "rule needs (Yang & Schoenholz 2017)")
    block = Residual(tuple(it.block for it in items), weight * trailing, shortcut)
    width = branch[-1].width if branch[-1].width is not None else base.width
    return Link(base, block, Info(node, what, branch=tuple(items)), 1.0, width, branch[-1].grid,
                base.depth + 1)


def attention_pending(link: Link) -> bool:
    """Whether ``link`` is an attention block whose output projection may still follow."""
    return isinstance(link.block, Attention) and bool(link.pending)
