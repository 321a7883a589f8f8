"""Validation of a network description: JSON (or the same Python dicts and lists) to a Network.

The format is documented field by field in :mod:`propcalc.networks.fields`.
Every error is a :class:`NetworkDescriptionError` naming the JSON pointer of
the bad block or field (``/blocks/3/residual/branch/0/dense/sigma_w2``), the
constraint and the value received. Nothing in a description is evaluated as
code: formulas go to the activation compiler, which parses them with an AST
whitelist.
"""

from __future__ import annotations

import math
import numbers
from collections.abc import Mapping, Sequence
from typing import Any

from ..activations.resolver import resolve
from ..domains import DOMAINS
from ..errors import InvalidParameterError, PropcalcError
from ..activations.names import nearest_name
from .blocks import (
    WEIGHT_BLOCKS,
    ActivationBlock,
    Attention,
    Block,
    Convolution,
    Dense,
    Dropout,
    Network,
    Norm,
    Pooling,
    Repeat,
    Residual,
)
from .fields import (
    BLOCK_SPECS,
    MAX_DESCRIBED_BLOCKS,
    MAX_EXPANDED_BLOCKS,
    MAX_NESTING,
    MAX_PARAMS,
    MAX_POSITIONS,
    NETWORK_FIELDS,
    BlockSpec,
    FieldSpec,
)

__all__ = ["NetworkDescriptionError", "network", "pointer"]


class NetworkDescriptionError(InvalidParameterError):
    """A network description was refused.

    Attributes
    ----------
    path : str
        JSON pointer of the bad block or field within the description ("" for
        the description itself).
    constraint : str
    value : Any
    """

    def __init__(self, path: str, constraint: str, value: Any, hint: str = "") -> None:
        self.path = path
        super().__init__(path or "the network description", constraint, _show(value), hint)


def _hint(word: Any, choices: Any) -> str:
    """ "did you mean dense?" for a typo of a block kind or a field name, or ""."""
    close = nearest_name(word, list(choices)) if isinstance(word, str) else None
    return f"did you mean {close}?" if close is not None else ""


def _show(value: Any) -> Any:
    """A short stand-in for big values in messages."""
    if isinstance(value, Mapping):
        return value if len(value) <= 4 else f"an object with {len(value)} keys"
    if isinstance(value, (list, tuple)) and len(value) > 8:
        return f"a list of {len(value)} items"
    if isinstance(value, str) and len(value) > 200:
        return value[:200] + "..."
    return value


def pointer(*parts: str | int) -> str:
    """JSON pointer of the parts (RFC 6901 escaping of ``~`` and ``/``)."""
    return "".join("/" + str(p).replace("~", "~0").replace("/", "~1") for p in parts)


class _Walk:
    """State of one validation: the block count and the nesting depth."""

    def __init__(self) -> None:
        self.count = 0

    # ---------------------------------------------------------------- values
    def domain(self, f: FieldSpec, value: Any, path: str) -> Any:
        assert f.domain is not None
        try:
            return DOMAINS[f.domain].check(value, path)
        except InvalidParameterError as exc:
            raise NetworkDescriptionError(path, exc.constraint, value) from None

    def number(self, f: FieldSpec, value: Any, path: str) -> float:
        if f.domain is not None:
            return float(self.domain(f, value, path))
        if isinstance(value, bool) or not isinstance(value, numbers.Real):
            raise NetworkDescriptionError(path, f.constraint, value)
        try:
            x = float(value)
        except (OverflowError, ValueError):
            raise NetworkDescriptionError(path, f.constraint, value) from None
        if not f.admits(x):
            raise NetworkDescriptionError(path, f.constraint, value)
        return x

    def integer(self, f: FieldSpec, value: Any, path: str) -> int:
        if f.domain is not None:
            return int(self.domain(f, value, path))
        if isinstance(value, bool) or not isinstance(value, numbers.Real):
            raise NetworkDescriptionError(path, f.constraint, value)
        if not isinstance(value, numbers.Integral):
            x = float(value)
            if not math.isfinite(x) or x != int(x):
                raise NetworkDescriptionError(path, f.constraint, value)
        n = int(value)
        if abs(n) > 2**53 or not f.admits(float(n)):
            raise NetworkDescriptionError(path, f.constraint, value)
        return n

    def sizes(self, f: FieldSpec, value: Any, path: str) -> tuple[int, ...]:
        if isinstance(value, (list, tuple)):
            if not 1 <= len(value) <= 3:
                raise NetworkDescriptionError(path, f.constraint, value)
            return tuple(self.integer(f, v, pointer_join(path, i)) for i, v in enumerate(value))
        return (self.integer(f, value, path),)

    def value(self, f: FieldSpec, value: Any, path: str, depth: int) -> Any:
        if f.type == "number":
            return self.number(f, value, path)
        if f.type == "integer":
            return self.integer(f, value, path)
        if f.type == "sizes":
            return self.sizes(f, value, path)
        if f.type == "choice":
            if not isinstance(value, str) or value not in f.choices:
                raise NetworkDescriptionError(path, f.constraint, value)
            return value
        if f.type == "text":
            if not isinstance(value, str) or not value.strip():
                raise NetworkDescriptionError(path, "a non-empty string", value)
            return value
        if f.type == "params":
            return self.params(f, value, path)
        return self.blocks(value, path, depth + 1)

    def params(self, f: FieldSpec, value: Any, path: str) -> tuple[tuple[str, float], ...]:
        if not isinstance(value, Mapping) or len(value) > MAX_PARAMS:
            raise NetworkDescriptionError(path, f.constraint, value)
        out = []
        for name, v in value.items():
            p = pointer_join(path, name)
            if not isinstance(name, str) or not name.isidentifier() or len(name) > 32:
                raise NetworkDescriptionError(p, "a parameter name (an identifier of at most "
                                                 "32 characters)", name)
            out.append((name, self.number(_PARAM, v, p)))
        return tuple(sorted(out))

    # ---------------------------------------------------------------- blocks
    def blocks(self, value: Any, path: str, depth: int) -> tuple[Block, ...]:
        if depth > MAX_NESTING:
            raise NetworkDescriptionError(
                path, f"nested at most {MAX_NESTING} levels deep (residual and repeat blocks)",
                f"level {depth}")
        if not isinstance(value, Sequence) or isinstance(value, (str, bytes)) or not value:
            raise NetworkDescriptionError(path, "a non-empty list of blocks", value)
        if self.count + len(value) > MAX_DESCRIBED_BLOCKS:
            raise NetworkDescriptionError(
                path, f"part of a description of at most {MAX_DESCRIBED_BLOCKS} blocks",
                f"{self.count + len(value)} blocks or more")
        self.count += len(value)
        return tuple(self.block(b, pointer_join(path, i), depth) for i, b in enumerate(value))

    def block(self, value: Any, path: str, depth: int) -> Block:
        kinds = ", ".join(BLOCK_SPECS)
        if not isinstance(value, Mapping) or len(value) != 1:
            raise NetworkDescriptionError(path, f"an object with exactly one key, the block kind "
                                                f"({kinds})", value)
        (kind, body), = value.items()
        if kind not in BLOCK_SPECS:
            raise NetworkDescriptionError(pointer_join(path, str(kind)),
                                          f"a block kind ({kinds})", kind,
                                          _hint(kind, BLOCK_SPECS))
        spec = BLOCK_SPECS[kind]
        bpath = pointer_join(path, kind)
        if spec.shorthand is not None and isinstance(body, str):
            body = {spec.shorthand: body}
        values = self.fields(spec, body, bpath, depth)
        return _BUILDERS[kind](values, bpath)

    def fields(self, spec: BlockSpec, body: Any, path: str, depth: int) -> dict[str, Any]:
        if not isinstance(body, Mapping):
            alt = "a string or an object" if spec.shorthand else "an object"
            raise NetworkDescriptionError(path, f"{alt} ({spec.doc})", body)
        names = [f.name for f in spec.fields]
        for key in body:
            if key not in names:
                raise NetworkDescriptionError(pointer_join(path, str(key)),
                                              f"a field of {spec.kind} ({', '.join(names)})", key,
                                              _hint(key, names))
        out: dict[str, Any] = {}
        for f in spec.fields:
            if f.name in body:
                out[f.name] = self.value(f, body[f.name], pointer_join(path, f.name), depth)
            elif f.required:
                raise NetworkDescriptionError(pointer_join(path, f.name),
                                              f"present ({f.constraint})", None)
            else:
                out[f.name] = f.default
        return out


_PARAM = FieldSpec("parameter", "number", domain="activation_parameter")


def pointer_join(path: str, *parts: str | int) -> str:
    """``path`` extended by escaped JSON pointer tokens."""
    return path + pointer(*parts)


def _has_weights(blocks: tuple[Block, ...]) -> bool:
    for b in blocks:
        if isinstance(b, WEIGHT_BLOCKS):
            return True
        if isinstance(b, Repeat) and _has_weights(b.blocks):
            return True
        if isinstance(b, Residual) and _has_weights(b.branch):
            return True
    return False


# -------------------------------------------------------------------- builders
def _dense(v: dict[str, Any], path: str) -> Dense:
    return Dense(v["sigma_w2"], v["sigma_b2"], v["width"], v["weights"])


def _activation(v: dict[str, Any], path: str) -> ActivationBlock:
    params = v["params"] if isinstance(v["params"], tuple) else ()
    try:
        act = resolve(v["formula"], "formula", **dict(params))
    except PropcalcError as exc:
        raise NetworkDescriptionError(pointer_join(path, "formula"),
                                      f"a built-in activation or a valid formula ({exc})",
                                      v["formula"]) from None
    return ActivationBlock(v["formula"], params, act)


def _residual(v: dict[str, Any], path: str) -> Residual:
    if not _has_weights(v["branch"]):
        raise NetworkDescriptionError(
            pointer_join(path, "branch"),
            "a list of blocks containing a dense, convolution or attention block (fresh weights "
            "make the branch independent of the shortcut)", [b.describe() for b in v["branch"]])
    return Residual(v["branch"], v["weight"], v["shortcut"])


def _norm(v: dict[str, Any], path: str) -> Norm:
    return Norm(v["kind"], v["gain"], v["eps"])


def _dropout(v: dict[str, Any], path: str) -> Dropout:
    return Dropout(v["keep_rate"])


def _repeat(v: dict[str, Any], path: str) -> Repeat:
    return Repeat(v["times"], v["blocks"])


def _broadcast(sizes: tuple[int, ...], like: tuple[int, ...], path: str,
               value: Any) -> tuple[int, ...]:
    if len(sizes) == len(like):
        return sizes
    if len(sizes) == 1:
        return sizes * len(like)
    raise NetworkDescriptionError(path, f"one size or {len(like)} sizes (as many as the "
                                        "kernel or window)", list(sizes))


def _convolution(v: dict[str, Any], path: str) -> Convolution:
    kernel = v["kernel"]
    stride = v["stride"] if isinstance(v["stride"], tuple) else (1,)
    stride = _broadcast(stride, kernel, pointer_join(path, "stride"), stride)
    return Convolution(v["sigma_w2"], v["sigma_b2"], kernel, stride, v["width"], v["weights"])


def _pooling(v: dict[str, Any], path: str) -> Pooling:
    kind = v["kind"]
    if kind == "global_average":
        for name in ("window", "stride"):
            if v[name] is not None:
                raise NetworkDescriptionError(pointer_join(path, name),
                                              "absent for global_average pooling", list(v[name]))
        if v["positions"] is None:
            raise NetworkDescriptionError(pointer_join(path, "positions"),
                                          "present for global_average pooling (the number of "
                                          "positions averaged)", None)
        return Pooling(kind, positions=v["positions"])
    if v["positions"] is not None:
        raise NetworkDescriptionError(pointer_join(path, "positions"),
                                      f"absent for {kind} pooling (give window)", v["positions"])
    if v["window"] is None:
        raise NetworkDescriptionError(pointer_join(path, "window"),
                                      f"present for {kind} pooling", None)
    window = v["window"]
    stride = window if v["stride"] is None else _broadcast(v["stride"], window,
                                                          pointer_join(path, "stride"), None)
    if any(s > w for s, w in zip(stride, window)):
        raise NetworkDescriptionError(pointer_join(path, "stride"),
                                      "at most the window in every dimension", list(stride))
    return Pooling(kind, window, stride)


def _attention(v: dict[str, Any], path: str) -> Attention:
    width, heads = v["width"], v["heads"]
    if width is not None and width % heads:
        raise NetworkDescriptionError(pointer_join(path, "width"),
                                      f"a multiple of heads ({heads})", width)
    return Attention(v["tokens"], heads, width, v["value_sigma_w2"], v["output_sigma_w2"],
                     v["query_key_sigma_w2"], v["query_key_scale"], v["sigma_b2"])


_BUILDERS = {"dense": _dense, "activation": _activation, "residual": _residual, "norm": _norm,
             "dropout": _dropout, "repeat": _repeat, "convolution": _convolution,
             "pooling": _pooling, "attention": _attention}


# -------------------------------------------------------------------- widths
#: Block visits of the width check (nested repeats are walked twice when a copy changes the
#: width; beyond this many visits the remaining checks are skipped).
_WIDTH_VISITS = 200_000


def _width_out(blocks: tuple[Block, ...], width: int | None, path: str,
               budget: list[int]) -> int | None:
    """The stream width after ``blocks`` (None when unknown); checks residual branches."""
    for i, b in enumerate(blocks):
        budget[0] -= 1
        if budget[0] < 0:
            return None
        p = pointer_join(path, i)
        if isinstance(b, (Dense, Convolution)):
            width = b.width if b.width is not None else None
        elif isinstance(b, Attention):
            width = b.width if b.width is not None else width
        elif isinstance(b, Repeat):
            rpath = pointer_join(p, "repeat", "blocks")
            after = _width_out(b.blocks, width, rpath, budget)
            if b.times > 1 and after != width:
                after = _width_out(b.blocks, after, rpath, budget)
            width = after
        elif isinstance(b, Residual):
            bpath = pointer_join(p, "residual", "branch")
            out = _width_out(b.branch, width, bpath, budget)
            if width is not None and out is not None and out != width:
                raise NetworkDescriptionError(
                    bpath, f"a branch whose output width equals its input width ({width})",
                    f"output width {out}")
            width = width if width is not None else out
    return width


def network(description: Any) -> Network:
    """Validate a network description and return the Network.

    Parameters
    ----------
    description : mapping or Network
        ``{"blocks": [...], "input_width": n}`` as parsed JSON or the same
        Python dicts and lists (the format: :mod:`propcalc.networks.fields`);
        a Network is returned unchanged.

    Returns
    -------
    Network

    Raises
    ------
    NetworkDescriptionError
        For anything outside the format or its limits, naming the JSON pointer
        of the bad block or field, the constraint and the value.

    Examples
    --------
    >>> net = network({"blocks": [{"repeat": {"times": 10, "blocks": [
    ...     {"dense": {"sigma_w2": 2.0, "sigma_b2": 0.0}}, {"activation": "relu"}]}}]})
    >>> net.n_positions
    20
    """
    if isinstance(description, Network):
        return description
    if not isinstance(description, Mapping):
        raise NetworkDescriptionError("", 'an object with a "blocks" list', description)
    names = [f.name for f in NETWORK_FIELDS]
    for key in description:
        if key not in names:
            raise NetworkDescriptionError(pointer(str(key)),
                                          f"a top-level field ({', '.join(names)})", key)
    walk = _Walk()
    if "blocks" not in description:
        raise NetworkDescriptionError("/blocks", "present (a non-empty list of blocks)", None)
    blocks = walk.blocks(description["blocks"], "/blocks", 0)
    input_width = None
    if "input_width" in description:  # null is refused, as the JSON Schema says
        input_width = walk.integer(NETWORK_FIELDS[1], description["input_width"], "/input_width")
    net = Network(blocks, input_width)
    if net.n_positions > MAX_POSITIONS:
        raise NetworkDescriptionError("/blocks", f"a network of at most {MAX_POSITIONS} stream "
                                                 "positions once repeats are expanded",
                                      f"{net.n_positions} positions")
    if net.n_expanded_blocks > MAX_EXPANDED_BLOCKS:
        raise NetworkDescriptionError("/blocks", f"a network of at most {MAX_EXPANDED_BLOCKS} "
                                                 "elementary blocks once repeats are expanded",
                                      f"{net.n_expanded_blocks} blocks")
    _width_out(blocks, input_width, "/blocks", [_WIDTH_VISITS])
    return net
