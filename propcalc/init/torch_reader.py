"""Read a torch module into a network description, by torch.fx symbolic tracing.

:func:`read_module` traces the module (``torch.fx``), runs one example input through
the traced graph to learn every tensor's shape (the number of tokens, the grid of a
convolution, how many positions a flatten or a mean gathers), and walks the graph
(:mod:`propcalc.init.torch_walk`, :mod:`propcalc.init.torch_dispatch`,
:mod:`propcalc.init.torch_attention`) into the blocks of
:mod:`propcalc.networks` (the table of what is read is in
:mod:`propcalc.init.torch_dispatch`). Anything else is refused with a
:class:`ModuleReadError` naming the graph node, what it calls and why.

The module is read as it trains: dropout and batch norm as in training mode,
whatever its current mode (its flags are restored afterwards; the example runs in
evaluation mode without gradients, so batch-norm running statistics are not
touched). Weight scales are measured from its tensors or taken from torch's
defaults (:mod:`propcalc.init.torch_ops`). Weights are taken as random and
independent, as at initialisation: a trained module's weights are not, and the
predictions do not apply to it.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

from ..errors import InvalidParameterError
from ..networks.blocks import Convolution, Dense, Network
from ..networks.description import NetworkDescriptionError, network
from ..results import OMIT, Result
from .torch_adapter import TORCH_INSTALL_HINT
from .torch_links import Item, absorb, ancestors, assemble
from .torch_dispatch import visit
from .torch_ops import SCALES, ModuleReadError
from .torch_walk import Walker

__all__ = ["ModuleBlock", "ModuleReading", "ModuleReadError", "read_module", "MAX_EXAMPLE_SIZE"]

#: Largest example input built from a shape (elements).
MAX_EXAMPLE_SIZE = 1 << 24


@dataclass(frozen=True)
class ModuleBlock(Result):
    """One block of the description and where it is in the module.

    Attributes
    ----------
    path : str
        JSON pointer of the block in the description.
    kind : str
        The block kind.
    node : str
        The traced graph's node whose output is the stream after the block ("" inside
        a module that was written out, such as nn.TransformerEncoderLayer).
    source : str
        The node or module in words.
    module : str or None
        Qualified name of the module holding the block's weights (dense, convolution,
        attention, norm) or its activation.
    weight_factor, bias_factor : float
        The description's sigma_w2 (sigma_b2) over the module's own: numbers next to
        the layer in the code that were made part of it.
    roles : dict
        Other modules of the block by role (an attention block's "query", "key",
        "value", "output" projections).
    """

    path: str
    kind: str
    node: str
    source: str
    module: str | None
    weight_factor: float = 1.0
    bias_factor: float = 1.0
    roles: dict[str, str] = field(default_factory=dict)


@dataclass(frozen=True)
class ModuleReading(Result):
    """A torch module read into a network description.

    Attributes
    ----------
    description : dict
        The description (:func:`propcalc.network` accepts it).
    blocks : tuple of ModuleBlock
        Every block, residual branches included, in order.
    positions : tuple of str
        For stream positions 1..L, the graph node whose output is that stream ("" when
        it has none, inside a written-out module).
    input_node : str
        The graph's input node.
    input_shape : tuple of int
        The example's shape.
    scales : str
        "measured" or "default".
    notes : tuple of str
        What was read with an assumption or is not modelled.
    """

    description: dict[str, Any]
    blocks: tuple[ModuleBlock, ...]
    positions: tuple[str, ...]
    input_node: str
    input_shape: tuple[int, ...]
    scales: str
    notes: tuple[str, ...] = ()
    network: Network = field(default=None, repr=False, metadata=OMIT)  # type: ignore[assignment]
    graph_module: Any = field(default=None, repr=False, compare=False, metadata=OMIT)

    def block(self, path: str) -> ModuleBlock:
        """The block at a JSON pointer."""
        for b in self.blocks:
            if b.path == path:
                return b
        raise KeyError(path)


def _torch() -> Any:
    try:
        import torch
    except ImportError:
        raise ImportError(TORCH_INSTALL_HINT) from None
    return torch


def _example(example: Any, module: Any) -> Any:
    """The example input: a tensor as given, or a seeded standard normal tensor of a shape."""
    torch = _torch()
    if isinstance(example, torch.Tensor):
        return example
    if isinstance(example, (str, bytes)) or not hasattr(example, "__iter__"):
        raise InvalidParameterError("example", "a tensor or a shape (a sequence of 1 to 6 "
                                               "positive integers, the batch first)", example)
    shape = list(example)
    if not 1 <= len(shape) <= 6 or any(isinstance(s, bool) or not isinstance(s, int) or s < 1
                                       for s in shape):
        raise InvalidParameterError("example", "a shape of 1 to 6 positive integers", example)
    if math.prod(shape) > MAX_EXAMPLE_SIZE:
        raise InvalidParameterError("example", f"a shape of at most {MAX_EXAMPLE_SIZE} "
                                               "elements", example)
    dtype = next((p.dtype for p in module.parameters() if p.is_floating_point()),
                 torch.float32)
    gen = torch.Generator().manual_seed(0)
    return torch.randn(shape, generator=gen, dtype=torch.float64).to(dtype)


def _trace(module: Any, x: Any) -> Any:
    """The traced GraphModule with tensor shapes from running ``x`` through it."""
    torch = _torch()
    from torch.fx.passes.shape_prop import ShapeProp

    flags = {m: m.training for m in module.modules()}
    name = type(module).__name__
    try:
        module.train()  # trace what runs in training (dropout, batch statistics)
        tracer = torch.fx.Tracer()
        try:
            graph = tracer.trace(_wrapped(tracer, module))
        except Exception as exc:  # user code: any failure of tracing is reported
            raise ModuleReadError("", f"the module {name}", f"torch.fx symbolic tracing failed "
                                  f"({type(exc).__name__}: {exc}); control flow that depends on "
                                  "tensor values cannot be traced") from None
        gm = torch.fx.GraphModule(tracer.root, graph)
        module.eval()
        try:
            with torch.no_grad():
                ShapeProp(gm).propagate(x)
        except Exception as exc:  # user code
            raise ModuleReadError("", f"the module {name}", f"the example input of shape "
                                  f"{list(x.shape)} does not run through it "
                                  f"({type(exc).__name__}: {exc})") from None
    finally:
        for m, flag in flags.items():
            m.training = flag
    return gm


#: The name under which a module that torch.fx treats as a leaf is wrapped to be traced.
_WRAP = "wrapped_root"


def _wrapped(tracer: Any, module: Any) -> Any:
    """The module, or a container holding it when torch.fx would not look inside it (a module
    of torch.nn itself, such as nn.TransformerEncoder, is a leaf of the trace)."""
    import torch

    if not tracer.is_leaf_module(module, ""):
        return module
    class Holder(torch.nn.Module):
        def forward(self, x: Any) -> Any:
            return getattr(self, _WRAP)(x)

    holder = Holder()
    holder.add_module(_WRAP, module)
    return holder


def _unwrap(name: str) -> str:
    """A module name of the wrapped trace as the user's module names it."""
    if name == _WRAP:
        return ""
    return name[len(_WRAP) + 1:] if name.startswith(_WRAP + ".") else name


def _unwrap_text(text: str) -> str:
    return text.replace(f"'{_WRAP}.", "'").replace(f"module '{_WRAP}'", "the module")


def _records(items: list[Item], prefix: str, out: list[ModuleBlock]) -> None:
    for i, it in enumerate(items):
        path = f"{prefix}/{i}"
        info = it.info
        module = None if info.module is None else _unwrap(info.module)
        out.append(ModuleBlock(path, it.block.KIND, info.node, _unwrap_text(info.what), module,
                               info.weight_factor, info.bias_factor,
                               {k: _unwrap(v) for k, v in info.extra}))
        if info.branch:
            _records(list(info.branch), f"{path}/residual/branch", out)


def read_module(module: Any, example: Any, *, scales: str = "measured") -> ModuleReading:
    """Read a torch module into a network description.

    Parameters
    ----------
    module : torch.nn.Module
        A module whose forward takes one tensor and returns one tensor.
    example : torch.Tensor or sequence of int
        An input as the module receives it (the batch included), or its shape (a
        seeded standard normal tensor is made); it gives the tokens, grids and
        positions that a description states.
    scales : {"measured", "default"}
        Weight scales measured from the module's tensors, or those of torch's
        default initialisation (:mod:`propcalc.init.torch_ops`).

    Returns
    -------
    ModuleReading
        ``.description`` for :func:`propcalc.network_propagation`,
        :func:`propcalc.network_plan` and the rest; ``.blocks`` says which module
        each block comes from.

    Raises
    ------
    ModuleReadError
        For a module or call the description does not have, naming the graph node.
    InvalidParameterError
        For a bad ``module``, ``example`` or ``scales``.
    ImportError
        If torch is not installed.

    Examples
    --------
    >>> import torch.nn as nn                                         # doctest: +SKIP
    >>> mlp = nn.Sequential(nn.Linear(64, 256), nn.Tanh(), nn.Linear(256, 10))  # doctest: +SKIP
    >>> r = read_module(mlp, (8, 64))                                 # doctest: +SKIP
    >>> [next(iter(b)) for b in r.description["blocks"]]              # doctest: +SKIP
    ['dense', 'activation', 'dense']
    """
    torch = _torch()
    if not isinstance(module, torch.nn.Module):
        raise InvalidParameterError("module", "a torch.nn.Module", type(module).__name__)
    if scales not in SCALES:
        raise InvalidParameterError("scales", 'one of "measured", "default"', scales)
    x = _example(example, module)
    gm = _trace(module, x)
    walker = Walker(gm, scales)
    try:
        out = walker.run(gm.graph, visit)
    except ModuleReadError as exc:
        raise ModuleReadError(exc.node, _unwrap_text(exc.what),
                              _unwrap_text(exc.reason)) from None
    items, trailing, node = assemble(ancestors(out)[1:])
    if trailing != 1.0:
        if items and isinstance(items[-1].block, (Dense, Convolution)):
            items[-1] = absorb(items[-1], trailing, False, node)
        else:
            raise ModuleReadError(node, "a multiplication at the end", "a number multiplies the "
                                  "output after its last layer: the description has no block "
                                  "for it")
    if not items:
        raise ModuleReadError("", f"the module {type(module).__name__}", "returns its input "
                              "without any layer the description holds")
    records: list[ModuleBlock] = []
    _records(items, "/blocks", records)
    desc = Network(tuple(it.block for it in items), walker.input_width).describe()
    try:
        net = network(desc)
    except NetworkDescriptionError as exc:
        raise _located(exc, records) from None
    return ModuleReading(desc, tuple(records), tuple(it.info.node for it in items),
                         walker.input_node, tuple(int(s) for s in x.shape), scales,
                         tuple(_unwrap_text(n) for n in walker.notes), net, gm)


def _located(exc: NetworkDescriptionError, records: list[ModuleBlock]) -> ModuleReadError:
    """The description's refusal, told at the module's node."""
    best = None
    for r in records:
        if exc.path.startswith(r.path + "/") or exc.path == r.path:
            if best is None or len(r.path) > len(best.path):
                best = r
    if best is None:
        return ModuleReadError("", "the module", str(exc))
    hint = " (its weights are zero: a zero-initialised layer)" if "sigma_w2" in exc.path and \
        exc.value == 0.0 else ""
    return ModuleReadError(best.node, best.source, f"{exc}{hint}")
