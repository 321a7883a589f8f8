"""The summary a user reads after a network propagation.

* where two inputs become indistinguishable (1 - c <= DISTANCE) or lose their
  correlation (|c| <= DECORRELATED while |c0| > 2 DECORRELATED);
* how much the forward signal and the gradient grow or shrink, and where the
  gradient first leaves [1 / GRADIENT_FACTOR, GRADIENT_FACTOR] counting from the
  output;
* depth behaviour along the most repeated block: a power law (residual networks,
  the edge of chaos: no finite exponential depth scale; Yang & Schoenholz 2017,
  Schoenholz et al. 2017) or an exponential with its depth scale, whichever fits
  the second half of the copies better on log scales;
* tokens that become identical (rank collapse of attention, Noci et al. 2022);
* spatial structure damped by convolutions (Xiao et al. 2018);
* what to change.

The thresholds are choices of ours, stated in the result (common practice, no source).
"""

from __future__ import annotations

import math
from collections import Counter
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..results import Result
from .blocks import Block, Network, Norm, Repeat, Residual
from .spatial import SpatialDamping, spatial_damping
from .walk import Trace

__all__ = ["DISTANCE", "DECORRELATED", "GRADIENT_FACTOR", "SIGNAL_FACTOR", "Finding",
           "DepthLaw", "NetworkSummary", "summarise"]

#: Two inputs count as indistinguishable when 1 - c is at most this (ours: common practice,
#: no source).
DISTANCE = 1e-3
#: Two inputs count as uncorrelated when |c| is at most this (ours: common practice, no source).
DECORRELATED = 0.05
#: Gradients "grow" or "shrink" beyond this factor (ours: common practice, no source).
GRADIENT_FACTOR = 10.0
#: The forward signal "grows" or "shrinks" beyond this factor (ours: common practice, no source).
SIGNAL_FACTOR = 100.0
#: Copies of a block needed for a depth law.
_MIN_COPIES = 16


@dataclass(frozen=True)
class Finding(Result):
    """One statement of the summary.

    Attributes
    ----------
    topic : str
        "validity", "correlation", "gradient", "signal", "depth", "attention",
        "spatial" or "note".
    position : int or None
        The stream position it concerns.
    value : float or None
        Its number.
    message : str
    advice : str
        What to change ("" when nothing needs to).
    """

    topic: str
    position: int | None
    value: float | None
    message: str
    advice: str = ""


@dataclass(frozen=True)
class DepthLaw(Result):
    """How a quantity behaves along the copies of the most repeated block.

    Attributes
    ----------
    quantity : str
        "1 - c", "q" or "gradient".
    law : str
        "power" (``~ position^exponent``) or "exponential" (``~ exp(-position / scale)``).
    exponent : float
        The power-law exponent (for "power") or the log-slope per position (for
        "exponential").
    depth_scale : float or None
        ``-1 / slope`` in positions for a decreasing exponential (inf when flat).
    first, last : int
        Positions fitted.
    path : str
        The block whose copies were fitted.
    """

    quantity: str
    law: str
    exponent: float
    depth_scale: float | None
    first: int
    last: int
    path: str


@dataclass(frozen=True)
class NetworkSummary(Result):
    """What the propagation means for training, with the thresholds used.

    Attributes
    ----------
    distance, decorrelated, gradient_factor, signal_factor : float
        The thresholds (see the module docstring).
    indistinguishable_at, decorrelated_at : int or None
        First positions where the two inputs merge / lose their correlation.
    distance_ratio : float or None
        ``(1 - c_L) / (1 - c0)``: > 1 when the network pulls inputs apart.
    signal_ratio : float or None
        ``q_L / q0``.
    gradient_input : float or None
        The input's gradient relative to the output's.
    gradient_beyond_at : int or None
        The position nearest the output whose gradient leaves
        [1 / gradient_factor, gradient_factor].
    depth_laws : tuple of DepthLaw
    spatial : SpatialDamping or None
    findings : tuple of Finding
    """

    distance: float
    decorrelated: float
    gradient_factor: float
    signal_factor: float
    indistinguishable_at: int | None
    decorrelated_at: int | None
    distance_ratio: float | None
    signal_ratio: float | None
    gradient_input: float | None
    gradient_beyond_at: int | None
    depth_laws: tuple[DepthLaw, ...]
    spatial: SpatialDamping | None
    findings: tuple[Finding, ...]


def _has(blocks: tuple[Block, ...], test: Any) -> bool:
    for b in blocks:
        if test(b):
            return True
        if isinstance(b, Repeat) and _has(b.blocks, test):
            return True
        if isinstance(b, Residual) and _has(b.branch, test):
            return True
    return False


def _first(values: list[float | None], test: Any) -> int | None:
    return next((i for i, v in enumerate(values) if v is not None and test(v)), None)


def _fit(pos: np.ndarray, y: np.ndarray) -> tuple[str, float, float | None] | None:
    """("power" | "exponential", exponent or slope, depth scale) from log-scale least squares."""
    if y.size < 8 or np.any(y <= 0) or not np.all(np.isfinite(y)):
        return None
    ly = np.log(y)
    if np.ptp(ly) < 1e-9:
        return None
    fits = {}
    for name, x in (("power", np.log(pos)), ("exponential", pos.astype(float))):
        slope, icpt = np.polyfit(x, ly, 1)
        fits[name] = (float(np.sum((ly - (slope * x + icpt)) ** 2)), float(slope))
    law = "power" if fits["power"][0] < fits["exponential"][0] else "exponential"
    slope = fits[law][1]
    scale = None if law == "power" else (math.inf if slope == 0 else -1.0 / slope)
    return law, slope, scale


def _depth_laws(tr: Trace, q: list[float | None], c: list[float | None],
                grad: list[float | None], known: int) -> list[DepthLaw]:
    paths = [v.path for v in tr.visits[:known]]
    counts = Counter(paths)
    if not counts:
        return []
    path, n = counts.most_common(1)[0]
    if n < _MIN_COPIES:
        return []
    idx = np.array([i for i, p in enumerate(paths, start=1) if p == path])
    idx = idx[len(idx) // 2:]
    out = []
    series = {"1 - c": [None if v is None else 1.0 - v for v in c], "q": q, "gradient": grad}
    for name, vals in series.items():
        y = np.array([vals[i] if vals[i] is not None else np.nan for i in idx], dtype=float)
        fit = _fit(idx, y)
        if fit is not None:
            out.append(DepthLaw(name, fit[0], fit[1], fit[2], int(idx[0]), int(idx[-1]), path))
    return out


def summarise(net: Network, tr: Trace, q: list[float | None], c: list[float | None],
              grad: list[float | None], records: list[Any], c_within: list[float | None] | None,
              known: int, notes: list[str]) -> NetworkSummary:
    """The summary of one propagation (see the module docstring)."""
    findings: list[Finding] = []
    n = len(q) - 1
    residual = _has(net.blocks, lambda b: isinstance(b, Residual))
    batch = _has(net.blocks, lambda b: isinstance(b, Norm) and b.kind == "batch")
    for i, note in enumerate(notes):
        if i == 0 and known < n:
            degenerate = tr.visits[known].step.stream.degenerate
            advice = ("scale the weight variances or branch weights so the signal stays in range, "
                      "or add a normalisation layer" if degenerate else
                      "keep activations inside residual branches (x + F(x) with F ending in a "
                      "dense or convolution block) so the stream stays Gaussian")
        else:
            advice = ""
        findings.append(Finding("validity", known + 1 if known < n else None, None, note, advice))
    fix_corr = ("lower the residual branch weight (propcalc.networks.branch_weight finds one "
                "for a target)" if residual else
                "move the initialisation towards the edge of chaos (propcalc.recommend)")
    c0 = c[0] if c[0] is not None else 0.0
    merged = None
    if 1.0 - c0 > DISTANCE:
        merged = _first(c, lambda v: 1.0 - v <= DISTANCE)
        if merged is not None:
            findings.append(Finding(
                "correlation", merged, c[merged],
                f"two inputs at c0 = {c0:.3g} become indistinguishable (1 - c <= {DISTANCE:g}, "
                f"ours) at position {merged} of {n} ({_where(records, merged)})", fix_corr))
    lost = None
    if abs(c0) > 2 * DECORRELATED:
        lost = _first(c, lambda v: abs(v) <= DECORRELATED)
        if lost is not None:
            findings.append(Finding(
                "correlation", lost, c[lost],
                f"two inputs at c0 = {c0:.3g} lose their correlation (|c| <= {DECORRELATED:g}, "
                f"ours) at position {lost} ({_where(records, lost)}): similar inputs end up "
                "unrelated",
                "batch norm decorrelates every pair of a batch; prefer layer norm" if batch else
                "lower sigma_w2 or the branch weight (the chaotic phase separates inputs)"))
    cl = c[n]
    ratio = None if (cl is None or c0 == 1.0) else (1.0 - cl) / (1.0 - c0)
    sig = None if q[n] is None or q[0] in (None, 0.0) else q[n] / q[0]  # type: ignore[operator]
    if sig is not None and not (1.0 / SIGNAL_FACTOR <= sig <= SIGNAL_FACTOR):
        findings.append(Finding("signal", n, sig,
                                f"the forward signal's second moment {'grows' if sig > 1 else 'shrinks'} "
                                f"by a factor {sig:.3g} from the input to the output",
                                "add a normalisation layer, or scale sigma_w2 / the branch weight "
                                "down" if sig > 1 else "raise sigma_w2 or add a normalisation layer"))
    g0 = grad[0]
    beyond = None
    for i in range(n, -1, -1):
        g = grad[i]
        if g is not None and not (1.0 / GRADIENT_FACTOR <= g <= GRADIENT_FACTOR):
            beyond = i
            break
    if g0 is not None and beyond is not None:
        grows = g0 > 1.0
        advice = ("batch norm makes gradients grow by E[phi'(u)^2] / Var[phi(u)] per block "
                  "(Yang et al. 2019): fewer batch-normalised blocks, layer norm, or residual "
                  "branches" if batch and grows else fix_corr)
        findings.append(Finding(
            "gradient", beyond, grad[beyond],
            f"gradients {'grow' if grows else 'shrink'} beyond a factor {GRADIENT_FACTOR:g} from "
            f"position {beyond} down to the input (input/output: {g0:.3g})", advice))
    laws = _depth_laws(tr, q, c, grad, known)
    for law in laws:
        if law.law == "power":
            text = (f"{law.quantity} behaves like position^{law.exponent:.3g} along the copies of "
                    f"{law.path} (positions {law.first}..{law.last}): a power law, so no finite "
                    "exponential depth scale describes it")
        else:
            text = (f"{law.quantity} changes by a factor {math.exp(law.exponent):.4g} per position "
                    f"along the copies of {law.path} (positions {law.first}..{law.last})")
        findings.append(Finding("depth", law.last, law.exponent, text))
    if c_within is not None:
        coll = _first(c_within, lambda v: 1.0 - v <= DISTANCE)
        if coll is not None and (c_within[0] is None or 1.0 - c_within[0] > DISTANCE):
            findings.append(Finding(
                "attention", coll, c_within[coll],
                f"the positions (tokens) of one input become identical at position {coll} "
                f"({_where(records, coll)}): rank collapse (Noci et al. 2022)",
                "use residual branches around attention with a weight below 1, and keep the "
                "query-key logits small at initialisation"))
    spatial = spatial_damping(net)
    if spatial is not None and spatial.damping[1] < 0.1:
        findings.append(Finding(
            "spatial", None, spatial.damping[1],
            f"structure at a wavelength of {spatial.wavelengths[1]:g} positions is damped by "
            f"{spatial.damping[1]:.3g} relative to the mean over positions (Xiao et al. 2018)",
            "delta-orthogonal convolution kernels keep every spatial mode at the dense rate"))
    seen = set()
    for r in records:
        for note in r.notes:
            if note not in seen and r.source == "mean field":
                seen.add(note)
                findings.append(Finding("note", r.index, None, note))
    return NetworkSummary(DISTANCE, DECORRELATED, GRADIENT_FACTOR, SIGNAL_FACTOR, merged, lost,
                          ratio, sig, g0, beyond, tuple(laws), spatial, tuple(findings))


def _where(records: list[Any], i: int) -> str:
    if i == 0:
        return "the input"
    r = records[i - 1]
    copy = f" copy {'.'.join(str(x) for x in r.copy)}" if r.copy else ""
    return f"{r.kind} at {r.path}{copy}"
