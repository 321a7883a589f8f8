"""How convolutions and pooling damp spatial structure, relative to the mean over positions.

Near the fixed point, the deviation of the spatial kernel from its fixed point
evolves linearly; a convolution whose weight variance is spread over its taps
with profile v (uniform over the K taps for Gaussian weights) averages it along
the diagonal, so its Fourier mode k is multiplied by chi_c times the Fourier
transform of the profile, ``|v_hat(k)| = |sin(K k / 2) / (K sin(k / 2))|``,
while the zero mode gets chi_c alone (Xiao et al. 2018, section 3 and eq. 3.5).
Delta-orthogonal kernels (the weight at the centre tap only) have
``v_hat = 1``: every mode keeps the dense rate (Xiao et al. 2018, section 4).
Average pooling over a window of w positions multiplies mode k by the same
Dirichlet factor with K = w.

The damping of a structure of wavelength lambda (in input positions) over the
network, relative to the zero mode, is the product of these factors along the
first spatial axis, each block seeing the frequency ``2 pi R / lambda`` at its own
resolution (R the product of the strides before it); a wavelength shorter than
two positions of a block's resolution is gone there (factor 0).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from ..results import Result
from .blocks import Block, Convolution, Network, Pooling, Repeat, Residual

__all__ = ["SpatialDamping", "spatial_damping", "WAVELENGTHS"]

#: Wavelengths (input positions) reported.
WAVELENGTHS = (2.0, 4.0, 8.0, 16.0, 32.0)


@dataclass(frozen=True)
class SpatialDamping(Result):
    """Damping of spatial structure by the network's convolutions and pooling.

    Attributes
    ----------
    wavelengths : tuple of float
        Wavelengths in input positions (first spatial axis).
    damping : tuple of float
        Product over the blocks of the mode's factor relative to the zero mode
        (1: kept at the dense rate; 0: removed).
    delta_orthogonal_damping : tuple of float
        The same with delta-orthogonal convolutions (pooling still averages).
    convolutions : int
        Convolution blocks met (residual branches counted with their weight only
        when the shortcut is zero: the shortcut carries every mode unchanged).
    """

    wavelengths: tuple[float, ...]
    damping: tuple[float, ...]
    delta_orthogonal_damping: tuple[float, ...]
    convolutions: int


def _dirichlet(size: int, k: float) -> float:
    """|sin(K k / 2) / (K sin(k / 2))|: the Fourier transform of a uniform profile of K taps."""
    if size == 1 or k == 0.0:
        return 1.0
    den = size * math.sin(k / 2.0)
    return abs(math.sin(size * k / 2.0) / den) if den != 0.0 else 1.0


def spatial_damping(net: Network) -> SpatialDamping | None:
    """The damping of spatial modes (None when the network has no convolution)."""
    count = 0
    factors = [1.0] * len(WAVELENGTHS)
    delta = [1.0] * len(WAVELENGTHS)

    def walk(blocks: tuple[Block, ...], resolution: float) -> float:
        nonlocal count
        for b in blocks:
            if isinstance(b, Repeat):
                for _ in range(b.times):
                    resolution = walk(b.blocks, resolution)
            elif isinstance(b, Residual):
                if b.shortcut == 0.0:
                    resolution = walk(b.branch, resolution)
            elif isinstance(b, (Convolution, Pooling)):
                if isinstance(b, Pooling) and b.kind == "global_average":
                    continue
                size = (b.kernel if isinstance(b, Convolution) else b.window or (1,))[0]
                stride = (b.stride or (1,))[0]
                if isinstance(b, Convolution):
                    count += 1
                for j, lam in enumerate(WAVELENGTHS):
                    k = 2.0 * math.pi * resolution / lam
                    f = 0.0 if k > math.pi else _dirichlet(size, k)
                    if isinstance(b, Convolution) and b.weights == "gaussian":
                        factors[j] *= f
                    elif isinstance(b, Pooling):
                        factors[j] *= f
                        delta[j] *= f
                    else:
                        factors[j] *= 1.0 if k <= math.pi else 0.0
                    if isinstance(b, Convolution):
                        delta[j] *= 1.0 if k <= math.pi else 0.0
                resolution *= stride
        return resolution

    walk(net.blocks, 1.0)
    if count == 0:
        return None
    return SpatialDamping(WAVELENGTHS, tuple(factors), tuple(delta), count)
