"""Response schemas of the extensions: dropout, maxout, the mean-variance maps, spectra and the
softmax layer (each states the members of one result dataclass, as in
:mod:`propcalc_api._responses`, which lists them in ``RESPONSE_SCHEMAS``).
"""

from __future__ import annotations

from marshmallow import fields

from propcalc import OutputLayerScale, Phase

from ._fields import (
    Choice,
    ExtNumber,
    JSONInteger,
    StrictBoolean,
)
from ._response_fields import ext, notes_field, num, pair_field, pair_meta, text
from ._result_schemas import use_schema
from ._schema_base import VARIANCE_STATUSES, StrictSchema, _d, _r

__all__ = [
    "AlphaDropoutSchema",
    "DropoutPropagationSchema",
    "DropoutSweepSchema",
    "InitialLossSchema",
    "IsometryAdviceSchema",
    "JacobianSpectrumSchema",
    "MaxMomentsSchema",
    "MaxProbabilitySchema",
    "MaxoutLayerSchema",
    "MaxoutSchema",
    "MeanVarianceFixedPointSchema",
    "OutputLayerScaleSchema",
    "SelfNormalizationSchema",
    "SoftmaxSchema",
]


class DropoutPropagationSchema(StrictSchema):
    """The mean-field report of a deep network with dropout at keep rate rho."""

    activation = text()
    keep_rate = num()
    sigma_w2 = num()
    sigma_b2 = num()
    q_input = num()
    status = _r(Choice(VARIANCE_STATUSES))
    q_star = num(allow_none=True, metadata=_d("fixed point of (sigma_w2 / rho) E[phi^2] + "
                                              "sigma_b2"))
    chi_q = ext(allow_none=True)
    chi_1 = ext(allow_none=True, metadata=_d("(sigma_w2 / rho) E[phi'(sqrt(q*) z)^2]"))
    c_star = num(allow_none=True, metadata=_d("correlation fixed point (< 1 for rho < 1)"))
    chi_c = ext(allow_none=True)
    xi_c = ext(allow_none=True)
    trainable_depth = ext(allow_none=True)
    trainable_depth_rule = text()
    depth = _r(JSONInteger(allow_none=True))
    gradient_growth = ext(allow_none=True)
    depth_ok = _r(StrictBoolean(allow_none=True))
    verdict = text()
    notes = notes_field()

class DropoutSweepSchema(StrictSchema):
    """Dropout reports over several keep rates, in the order given."""

    activation = text()
    scale_with_keep_rate = _r(StrictBoolean())
    reports = _r(fields.List(fields.Nested(DropoutPropagationSchema)))

class MaxMomentsSchema(StrictSchema):
    """Moments of the largest of k iid standard normals."""

    k = _r(JSONInteger())
    mean = num(metadata=_d("E[X_k]"))
    second_moment = num(metadata=_d("E[X_k^2]"))
    recommended_sigma_w2 = num(metadata=_d("c_k = 1 / E[X_k^2] (Tseran & Montufar 2023)"))

class MaxoutLayerSchema(StrictSchema):
    """Initialisation and size of one dense maxout layer."""

    k = _r(JSONInteger())
    fan_in = _r(JSONInteger())
    fan_out = _r(JSONInteger())
    sigma_w2 = num()
    weight_std = num(metadata=_d("sqrt(sigma_w2 / fan_in)"))
    n_parameters = _r(JSONInteger(metadata=_d("k (fan_in fan_out + fan_out)")))
    plain_parameters = _r(JSONInteger(metadata=_d("a plain dense layer of the same shape")))
    weight_shape = _r(fields.List(JSONInteger(), metadata=_d("(k, fan_out, fan_in)",
                                                             minItems=3, maxItems=3)))

class MaxoutSchema(StrictSchema):
    """The mean-field report of a deep maxout network (and one layer when sizes are given)."""

    k = _r(JSONInteger())
    sigma_w2 = num()
    sigma_b2 = num()
    q_input = num()
    moments = _r(fields.Nested(MaxMomentsSchema))
    status = _r(Choice(VARIANCE_STATUSES))
    q_star = num(allow_none=True)
    chi_q = ext(metadata=_d("sigma_w2 E[X_k^2]: the variance map is linear"))
    growth_rate = ext(allow_none=True)
    chi_1 = ext(metadata=_d("sigma_w2"))
    c_star = num(allow_none=True)
    chi_c = ext(allow_none=True)
    xi_c = ext(allow_none=True)
    phase = _r(Choice([p.value for p in (Phase.ORDERED, Phase.EDGE_OF_CHAOS, Phase.UNBOUNDED)]))
    trainable_depth = ext(allow_none=True)
    trainable_depth_rule = text()
    depth = _r(JSONInteger(allow_none=True))
    gradient_growth = ext(allow_none=True)
    depth_ok = _r(StrictBoolean(allow_none=True))
    verdict = text()
    parameter_factor = _r(JSONInteger(metadata=_d("k: a maxout layer has k times the "
                                                  "parameters of a plain layer")))
    notes = notes_field()
    layer = _r(fields.Nested(MaxoutLayerSchema, allow_none=True,
                             metadata=_d("null unless fan_in and fan_out are given")))

class MeanVarianceFixedPointSchema(StrictSchema):
    """A fixed point (mu*, nu*) of the mean-variance map with its Jacobian."""

    mu = num()
    nu = num()
    jacobian = _r(fields.List(fields.List(ExtNumber(), metadata=pair_meta()),
                              metadata=pair_meta("rows (mu~, nu~), columns (mu, nu)")))
    eigenvalues_real = pair_field()
    eigenvalues_imag = pair_field()
    spectral_radius = ext()
    spectral_norm = ext()
    attracting = _r(StrictBoolean())

class SelfNormalizationSchema(StrictSchema):
    """Fixed points of the mean-variance map and whether the network self-normalises."""

    activation = text()
    omega = num()
    tau = num()
    fixed_points = _r(fields.List(fields.Nested(MeanVarianceFixedPointSchema)))
    nearest = _r(fields.Nested(MeanVarianceFixedPointSchema, allow_none=True))
    self_normalizing = _r(StrictBoolean())
    neutral = _r(StrictBoolean())
    zero_rate = ext(allow_none=True)
    method = text()
    message = text()

class AlphaDropoutSchema(StrictSchema):
    """Alpha dropout: y = a (x d + alpha' (1 - d)) + b keeps the mean and the variance."""

    keep_rate = num()
    alpha_prime = num()
    a = num()
    b = num()
    mean = num()
    variance = num()

class JacobianSpectrumSchema(StrictSchema):
    """Mean and variance of the spectrum of J J^T, Gaussian and orthogonal weights."""

    activation = text()
    depth = _r(JSONInteger())
    q_star = num()
    sigma_w2 = num()
    sigma_b2 = num(allow_none=True)
    mu_1 = num(metadata=_d("E[phi'(sqrt(q*) z)^2]"))
    mu_2 = num(metadata=_d("E[phi'(sqrt(q*) z)^4]"))
    moment_ratio = ext(metadata=_d("mu_2 / mu_1^2"))
    chi_1 = ext()
    mean = ext(metadata=_d("chi_1^L"))
    normalized_variance_gaussian = ext(metadata=_d("L mu_2 / mu_1^2"))
    normalized_variance_orthogonal = ext(metadata=_d("L (mu_2 / mu_1^2 - 1)"))
    variance_gaussian = ext()
    variance_orthogonal = ext()
    notes = notes_field()

class IsometryAdviceSchema(StrictSchema):
    """Where (if anywhere) on the edge of chaos the Jacobian is near-isometric."""

    activation = text()
    depth = _r(JSONInteger())
    max_variance = num()
    achievable = _r(StrictBoolean())
    weights = _r(Choice(["gaussian", "orthogonal"]))
    q_star = num(allow_none=True)
    sigma_w2 = num(allow_none=True)
    sigma_b2 = num(allow_none=True)
    spectrum = _r(fields.Nested(JacobianSpectrumSchema, allow_none=True))
    ratio_at_small_q = ext()
    ratio_at_large_q = ext()
    ratio_constant = _r(StrictBoolean())
    message = text()

class InitialLossSchema(StrictSchema):
    """Expected initial cross-entropy against ln K."""

    n_classes = _r(JSONInteger())
    logit_variance = num()
    expected_loss = num()
    log_classes = num(metadata=_d("ln K, the loss of uniform predictions"))
    excess = num()
    small_variance_approximation = num(metadata=_d("ln K + s2 (K - 1) / (2K)"))
    method = text()
    target_note = text()

class MaxProbabilitySchema(StrictSchema):
    """Expected largest class probability at initialisation."""

    n_classes = _r(JSONInteger())
    logit_variance = num()
    value = num()
    standard_error = num()
    method = _r(Choice(["exact (s2 = 0)", "quadrature", "monte carlo"]))
    n_samples = _r(JSONInteger(allow_none=True))
    seed = _r(JSONInteger(allow_none=True))
    uniform = num(metadata=_d("1 / K"))

class SoftmaxSchema(StrictSchema):
    """The softmax output at initialisation: expected loss and largest probability."""

    initial_loss = _r(fields.Nested(InitialLossSchema))
    max_probability = _r(fields.Nested(MaxProbabilitySchema))

class OutputLayerScaleSchema(StrictSchema):
    """The largest last-layer sigma_w2 whose expected initial loss is within the margin."""

    n_classes = _r(JSONInteger())
    margin = num()
    penultimate_second_moment = num()
    sigma_b2 = num()
    max_logit_variance = num()
    sigma_w2 = num()
    weight_std = num(allow_none=True)
    loss_at_scale = _r(fields.Nested(InitialLossSchema))
    max_probability_at_scale = _r(fields.Nested(MaxProbabilitySchema))
    current = _r(fields.Nested(InitialLossSchema, allow_none=True))
    notes = notes_field()


# the network plan's readout (a derived schema) nests this one (one name in the document)
use_schema(OutputLayerScale, OutputLayerScaleSchema)
