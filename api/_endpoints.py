"""The table of endpoints (:data:`ENDPOINTS`): it drives the views and the OpenAPI document.

One :class:`Endpoint` per operation: its rule, method, request and response schemas, the
:class:`~propcalc_api._service.Computations` (or :class:`~propcalc_api._plots.Plots`) method that
answers it, and its documented error statuses.
"""

from __future__ import annotations

from dataclasses import dataclass

__all__ = ["ENDPOINTS", "Endpoint"]


@dataclass(frozen=True)
class Endpoint:
    """One operation of the API.

    Attributes
    ----------
    name : str
        Flask endpoint name, cache namespace and OpenAPI operationId.
    rule : str
        URL rule (Flask syntax).
    method : str
    summary, description : str
    request : str or None
        Name of the body schema in :class:`Schemas` (POST).
    query : str or None
        Name of the query schema (GET with parameters).
    response : str
        Name of the 200 response schema.
    compute : str or None
        Name of the :class:`Computations` method (None: special view).
    statuses : tuple of int
        Documented error statuses.
    tag : str
        OpenAPI tag.
    body_of_query : str or None
        For a GET form: the body schema its validated query is loaded through,
        so that both forms make the same canonical request.
    image : bool
        True for the image endpoints: ``compute`` names a :class:`Plots`
        method, the body is PNG or SVG (``format`` or the Accept header), and
        ``response`` is unused.
    """

    name: str
    rule: str
    method: str
    summary: str
    description: str
    request: str | None
    query: str | None
    response: str
    compute: str | None
    statuses: tuple[int, ...]
    tag: str = "propagation"
    body_of_query: str | None = None
    image: bool = False


_POST_ERRORS = (400, 413, 415, 422, 500, 503)
_IMAGE_POST_ERRORS = (400, 406, 413, 415, 422, 500, 501, 503)
_IMAGE_GET_ERRORS = (304, 406, 422, 500, 501, 503)
_IMAGE_NOTE = (" The image is PNG or SVG: the member (query parameter) format chooses, else the "
               "Accept header (image/png, image/svg+xml; PNG without an Accept header or when it "
               "ranks both equally; 406 when it allows neither). The same request always gives "
               "the same bytes and ETag.")
_GET_NOTE = (" This GET form takes built-in activation names only (for browsers: <img src=...>);"
             " it answers If-None-Match with 304.")


def _image_endpoints(name: str, path: str, summary: str, description: str,
                     schema: str) -> tuple[Endpoint, Endpoint]:
    """The POST form and the GET (query) form of one image."""
    rule = f"/v1/plots/{path}"
    return (
        Endpoint(f"{name}_plot", rule, "POST", summary, description + _IMAGE_NOTE,
                 f"{schema}PlotRequest", None, "", name, _IMAGE_POST_ERRORS, "images",
                 image=True),
        Endpoint(f"{name}_plot_get", rule, "GET", summary + " (query form)",
                 description + _IMAGE_NOTE + _GET_NOTE, None, f"{schema}PlotQuery", "", name,
                 _IMAGE_GET_ERRORS, "images", body_of_query=f"{schema}PlotRequest", image=True),
    )

ENDPOINTS: tuple[Endpoint, ...] = (
    Endpoint("health", "/health", "GET", "Liveness",
             "Answers 200 while the service is up.", None, None, "Health", None, (500,), "service"),
    Endpoint("limits", "/v1/limits", "GET", "The limits this service enforces",
             "Body size, array lengths, grid sizes, formula limits, work budget, wall-clock "
             "limit and the fixed parameter ranges.", None, None, "LimitsInfo", None, (304, 500),
             "service"),
    Endpoint("activation_list", "/v1/activations", "GET", "List the built-in activations",
             "Every built-in with its description, breakpoints, properties (range, "
             "monotonicity, parity, smoothness, dead-unit probability, saturating tails) and "
             "gains (forward 1/sqrt(E[phi^2]), backward 1/sqrt(E[phi'^2]), z ~ N(0, 1)).",
             None, None, "ActivationList", "activation_list", (304, 500), "activations"),
    Endpoint("activation_one", "/v1/activations/<name>", "GET", "One built-in activation",
             "The built-in with its default parameters; for parameters or a formula use "
             "POST /v1/describe.", None, None, "Activation", None, (304, 404, 500), "activations"),
    Endpoint("describe", "/v1/describe", "POST", "Describe an activation (name, parameters or "
             "formula)", "Properties and gains of any activation, including typed formulas.",
             "DescribeRequest", None, "Activation", "describe", _POST_ERRORS, "activations"),
    Endpoint("propagation_get", "/v1/propagation", "GET", "Propagation report (query form)",
             "The same report as POST /v1/propagation for a built-in activation, with ETag "
             "and If-None-Match support.", None, "PropagationQuery", "Propagation",
             "propagation", (304, 422, 500, 503), body_of_query="PropagationRequest"),
    Endpoint("propagation", "/v1/propagation", "POST", "Propagation report",
             "Fixed point q*, chi_q, xi_q, chi_1, c*, chi_c, xi_c, phase and trainable depth "
             "(about 6 xi_c, an empirical rule of Schoenholz et al. 2017) at (sigma_w2, "
             "sigma_b2). A depth scale is \"inf\" exactly at the edge of chaos; q* is null "
             "when the variance has no finite fixed point.", "PropagationRequest", None,
             "Propagation", "propagation", _POST_ERRORS),
    Endpoint("critical_point", "/v1/critical-point", "POST", "One critical point",
             "sigma_w2 = 1 / E[phi'(sqrt(q*) z)^2], sigma_b2 = q* - sigma_w2 E[phi(sqrt(q*) z)^2] "
             "(Poole et al. 2016; Schoenholz et al. 2017); valid is false where sigma_b2 < 0.",
             "CriticalPointRequest", None, "CriticalPoint", "critical_point", _POST_ERRORS,
             "edge of chaos"),
    Endpoint("edge_of_chaos", "/v1/edge-of-chaos", "POST", "The edge-of-chaos line",
             "Sampled at q* values (q_star or q_star_grid; by default 0.01 ... 100), or every "
             "critical point with a given sigma_b2.", "EdgeOfChaosRequest", None, "EdgeOfChaos",
             "edge_of_chaos", _POST_ERRORS, "edge of chaos"),
    Endpoint("plan", "/v1/plan", "POST", "Per-layer initialisation plan",
             "Weight and bias scales for every layer of a network given by depth, widths or "
             "explicit dense/conv layers, for a normal, uniform, truncated normal (cut at +-2 "
             "std) or orthogonal law.", "PlanRequest", None, "InitPlan", "plan", _POST_ERRORS,
             "plans"),
    Endpoint("variance_map", "/v1/maps/variance", "POST", "Sampled variance map",
             "V(q) = sigma_w2 E[phi(sqrt(q) z)^2] + sigma_b2 (Poole et al. 2016), its slope and "
             "chi_1 at the requested q, for plotting.", "VarianceMapRequest", None, "VarianceMap",
             "variance_map", _POST_ERRORS, "maps"),
    Endpoint("correlation_map", "/v1/maps/correlation", "POST", "Sampled correlation map",
             "C(c) (Poole et al. 2016) and optionally C'(c) at the requested c, for inputs of "
             "variance q (default: the fixed point q*).", "CorrelationMapRequest", None,
             "CorrelationMap", "correlation_map", _POST_ERRORS, "maps"),
    Endpoint("dropout", "/v1/dropout", "POST", "Propagation with dropout",
             "Keep rate rho with 1/rho rescaling (Schoenholz et al. 2017): q* of (sigma_w2 / rho) "
             "E[phi^2] + sigma_b2, chi_1 = (sigma_w2 / rho) E[phi'^2], the correlation fixed "
             "point c* (< 1 for rho < 1), chi_c, the finite xi_c and the trainable depth (about "
             "6 xi_c, an empirical rule): with dropout there is no edge of chaos.",
             "DropoutRequest", None, "DropoutPropagation", "dropout", _POST_ERRORS, "dropout"),
    Endpoint("dropout_sweep", "/v1/dropout/sweep", "POST", "Dropout over several keep rates",
             "One dropout report per keep rate, in the order given; scale_with_keep_rate uses "
             "sigma_w2 * rho, which holds q* fixed.", "DropoutSweepRequest", None, "DropoutSweep",
             "dropout_sweep", _POST_ERRORS, "dropout"),
    Endpoint("maxout", "/v1/maxout", "POST", "Maxout networks of rank k",
             "Moments of the largest of k standard normals, the linear variance map "
             "V(q) = sigma_w2 E[X_k^2] q + sigma_b2, chi_1 = sigma_w2, the phase and depth "
             "scales (Goodfellow et al. 2013; default sigma_w2 c_k = 1 / E[X_k^2], Tseran & "
             "Montufar 2023), and with fan_in and fan_out the parameter count of one layer "
             "(k times a plain layer's).", "MaxoutRequest", None, "Maxout", "maxout",
             _POST_ERRORS, "maxout"),
    Endpoint("self_normalization", "/v1/self-normalization", "POST",
             "Mean-variance fixed points",
             "Fixed points (mu*, nu*) of (mu, nu) -> (E[phi(z)], Var[phi(z)]), z ~ N(mu omega, "
             "nu tau) (Klambauer et al. 2017), with the Jacobian (Stein's identities), its "
             "eigenvalues, spectral radius and norm, and whether the network self-normalises.",
             "SelfNormalizationRequest", None, "SelfNormalization", "self_normalization",
             _POST_ERRORS, "self-normalisation"),
    Endpoint("alpha_dropout", "/v1/alpha-dropout", "POST", "Alpha-dropout constants",
             "a and b of y = a (x d + alpha' (1 - d)) + b, which keep the mean and variance; at "
             "(0, 1) with SELU's alpha' the formula of Klambauer et al. 2017.",
             "AlphaDropoutRequest", None, "AlphaDropout", "alpha_dropout", _POST_ERRORS,
             "self-normalisation"),
    Endpoint("jacobian_spectrum", "/v1/jacobian-spectrum", "POST", "Jacobian spectrum moments",
             "Mean chi_1^L and variance of the squared singular values of the input-output "
             "Jacobian of a depth-L network at q*, for Gaussian and orthogonal weights "
             "(free probability; Pennington, Schoenholz & Ganguli 2017).",
             "JacobianSpectrumRequest", None, "JacobianSpectrum", "jacobian_spectrum",
             _POST_ERRORS, "isometry"),
    Endpoint("dynamical_isometry", "/v1/dynamical-isometry", "POST", "Isometry advice",
             "The largest q* on the edge of chaos whose orthogonal-weight spectral variance "
             "L (mu_2 / mu_1^2 - 1) meets the target, or why none does (ReLU: mu_2 / mu_1^2 = 2 "
             "at every q*).", "DynamicalIsometryRequest", None, "IsometryAdvice",
             "dynamical_isometry", _POST_ERRORS, "isometry"),
    Endpoint("softmax", "/v1/softmax", "POST", "Softmax output at initialisation",
             "Expected initial cross-entropy E[log sum_j exp(l_j) - l_y] for K iid N(0, s2) "
             "logits against ln K (quadrature), and the expected largest class probability "
             "(quadrature for K = 2, seeded Monte Carlo otherwise).", "SoftmaxRequest", None,
             "Softmax", "softmax", _POST_ERRORS, "softmax"),
    Endpoint("output_scale", "/v1/softmax/output-scale", "POST", "Last-layer scale for a margin",
             "The largest last-layer sigma_w2 whose expected initial loss stays within margin "
             "nats of ln K (an initial loss near ln K: common practice, no source).",
             "OutputScaleRequest", None, "OutputLayerScale", "output_scale", _POST_ERRORS,
             "softmax"),
    Endpoint("simulation", "/v1/simulate", "POST", "Finite-width check",
             "Seeded random networks of the given width against the mean-field q, c and "
             "squared gradient norms, layer by layer, with +-2 standard-error bands. "
             "width^2 * depth * repetitions is at most MAX_SIMULATION_SIZE.",
             "SimulationRequest", None, "Simulation", "simulation", _POST_ERRORS, "simulation"),
    Endpoint("network", "/v1/network", "POST", "Signal propagation through a described network",
             "A network as blocks (dense, activation, residual, norm, dropout, repeat, "
             "convolution, pooling, attention; the NetworkDescription schema) and two inputs "
             "(q0, c0): q, c and the gradient at every stream position (0 is the input), a "
             "record per block, the summary (where inputs merge or decorrelate, gradient "
             "growth, depth laws, what to change) and the initialisation plan "
             "(propcalc.network_plan; \"plan\": null skips it). Where the Gaussian recursion "
             "does not hold the positions come from a seeded finite-width simulation with "
             "bands. Errors in the description point into it (/network/blocks/3/dense/"
             "sigma_w2). Infinite-width predictions at initialisation.",
             "NetworkRequest", None, "NetworkAnalysis", "network", _POST_ERRORS, "networks"),
    Endpoint("shape", "/v1/shape", "POST", "Shape an activation for a target depth",
             "The transformed activation of the tailored activation transformation (method "
             "tat, Zhang et al. 2022; the leaky-ReLU slope form for relu and leaky_relu) or "
             "of deep kernel shaping (method dks, Martens et al. 2021): its parameters, the "
             "achieved C_L(0) and C_L'(1), the conditions, every root found and the one "
             "chosen, the depth verdict; used with sigma_w2 = 1, sigma_b2 = 0.",
             "ShapeRequest", None, "ShapedActivation", "shape", _POST_ERRORS, "shaping"),
    Endpoint("network_plot", "/v1/plots/network", "POST", "Network image",
             "q, c and the gradient against the stream position of a described network "
             "(the members of POST /v1/network without the plan), the positions the summary "
             "flags marked, simulated positions with their bands." + _IMAGE_NOTE,
             "NetworkPlotRequest", None, "", "network", _IMAGE_POST_ERRORS, "images",
             image=True),
    Endpoint("shape_plot", "/v1/plots/shape", "POST", "Shaping image",
             "The whole-network correlation map C_L(c_0) before (the base activation at its "
             "edge of chaos) and after shaping, with the target, and the correlation of two "
             "orthogonal inputs layer by layer (the members of POST /v1/shape and n_points)."
             + _IMAGE_NOTE, "ShapePlotRequest", None, "", "shape", _IMAGE_POST_ERRORS, "images",
             image=True),
    *_image_endpoints(
        "phase_diagram", "phase-diagram", "Phase diagram image",
        "Ordered (chi_1 < 1) and chaotic (chi_1 > 1) regions over a sigma_w2 x sigma_b2 grid, "
        "the edge-of-chaos line, labelled contours of xi_c and of the trainable depth 6 xi_c "
        "(an empirical rule of Schoenholz et al. 2017), and your point when sigma_w2 is given. "
        "Costs the image plus 1 work unit per grid point (5 for an activation with a jump).",
        "PhaseDiagram"),
    *_image_endpoints(
        "variance_map", "variance-map", "Variance-map image",
        "V(q) = sigma_w2 E[phi(sqrt(q) z)^2] + sigma_b2 against q (Poole et al. 2016) with the "
        "identity, its fixed points (filled: attracting) and the layer-to-layer iteration from "
        "q_1 = sigma_w2 q_input + sigma_b2.", "VarianceMap"),
    *_image_endpoints(
        "correlation_map", "correlation-map", "Correlation-map image",
        "C(c) at the variance fixed point q* (Poole et al. 2016) with the identity, its fixed "
        "points c = 1 and c*, and the slope chi_1 at c = 1 (Schoenholz et al. 2017).",
        "CorrelationMap"),
    *_image_endpoints(
        "depth_scales", "depth-scales", "Depth-scales image",
        "xi_q = -1 / ln chi_q and xi_c = -1 / ln C'(c*) against sigma_w2 at a fixed sigma_b2 "
        "(Schoenholz et al. 2017), the edge of chaos marked where xi_c diverges, the trainable "
        "depth about 6 xi_c on the right axis, and your point when sigma_w2 is given.",
        "DepthScales"),
)
