"""Initialisation: per-layer types (layers), drawing arrays (draw), the plan (plan), gains,
the planner (``recommend``) and the torch adapter. Imports run one way:
layers -> draw -> plan -> gains, planner -> torch_adapter."""
