"""Does it train? propcalc's predictions checked against real training on scikit-learn's
bundled handwritten digits.

Run by hand (not collected by pytest)::

    python tests/benchmarks/bench_training.py [--parts map ceilings lr defaults]
        [--out docs/figures] [--lr-seeds 0] [--defaults-lrs 0.001 plan] ...

What the README shows was run part by part on a loaded 2-core machine (one core's share
or less): ``--parts map``; ``--parts lr ceilings --lr-seeds 0 1`` (run as seed 0, then
seed 1 merged: every run seeds its own draws, so the order does not matter); ``--parts
defaults --defaults-lrs 0.001``. CPU time measured: map 5.5 min, lr 3.2 min per seed,
defaults 4.4 min, the ceilings 2-3 min (the options trimmed to fit: one seed for the map, two
for the sweeps, 300 and 500 steps); the wall time was 3-5 times longer at a load average of
9-10.

Each part trains plain multilayer perceptrons with torch (one thread, float32, seeded) and
writes its numbers into ``OUT/training_results.json`` (the other parts' entries are kept)
and one PNG figure (matplotlib, Agg):

* ``map`` (``trainability_map.png``): tanh networks over a grid of (sigma_w2, depth) at
  sigma_b2 = 0.05 (the plane of Schoenholz et al. 2017, Fig. 5), weights N(0, sigma_w2 /
  fan_in) and biases N(0, sigma_b2) in every layer, the readout included; SGD with momentum
  0.9 at one learning rate (1e-3). A cell *trains* when the training accuracy after the
  given steps reaches ``--threshold`` (default 0.5; chance is 0.1; our choice, common
  practice, no source). The prediction is propcalc's trainable depth, 6 xi_c
  (``propcalc.propagation(...).trainable_depth``; the empirical rule of Schoenholz et al.
  2017): a cell is predicted to train when depth <= 6 xi_c. The agreement is the count of
  cells where both say the same.
  With ``--map-seed N`` (N > 0) the map is stored as ``map_seedN`` and drawn into
  ``trainability_map_seedN.png``, beside seed 0's.
* ``ceilings`` (no training): adds to every stored map cell the learning-rate ceiling of its
  network for the map's optimiser (``propcalc.training.learning_rate_ceiling``, momentum
  0.9) and redraws the map with the cells whose learning rate is above it marked.
* ``lr`` (``learning_rate.png``): training accuracy against the learning rate at fixed
  depths (tanh 20 and 100, GELU 64; multiples 2^-7 ... 2^2 of the ceiling), plain SGD
  without momentum (the optimiser of the ceiling), the network initialised by
  ``apply_plan`` (``propcalc.init.torch_adapter``) from ``propcalc.recommend(act,
  widths=..., loss="cross_entropy", n_classes=10, batch_size=128, inputs=<the first 512
  training inputs>)`` (readout scaled as planned), with that plan's
  ``learning_rate_ceiling`` (2 / lambda_max), 4 / lambda_max (beyond it not even the
  catapult phase converges, Lewkowycz et al. 2020) and ``learning_rate`` marked.
* ``defaults`` (``plan_vs_defaults.png``): propcalc's plan (the same ``recommend`` for
  momentum 0.9, + ``apply_plan``) against the customary defaults: torch's default
  initialisation of ``nn.Linear`` and a fixed gain (``torch.nn.init.calculate_gain``: 5/3
  for tanh; for GELU, which it does not list, the ReLU gain sqrt(2) of He et al. 2015;
  weights N(0, gain^2 / fan_in), zero biases), at depth 100 (tanh) and 64 (GELU), width
  128, three seeds each, SGD with momentum 0.9 at each learning rate of
  ``--defaults-lrs`` ("plan": the plan's recommended ``learning_rate``).

Data: ``sklearn.datasets.load_digits`` (1797 images of 8 x 8 pixels, 10 classes), split 80/20
with a fixed permutation (numpy seed 0), each pixel standardised with the training part's
mean and standard deviation (constant pixels set to 0). The mean square input coordinate of
the training part (``q_input`` = 61/64 = 0.953: three pixels are constant there) is passed
to propcalc. Training: softmax cross-entropy, minibatches drawn with replacement from a
seeded generator; accuracies are measured on the whole training part and on the test part
at the end. A run whose loss becomes NaN or infinite (or exceeds 1e4) is stopped and
counted as not training ("diverged").

Network ``depth`` means the number of hidden Linear + activation layers; a readout Linear to
10 classes follows (so ``depth + 1`` weight layers).
"""

from __future__ import annotations

import argparse
import json
import math
import time
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

import numpy as np

import propcalc

N_CLASSES = 10
MAP_SIGMA_B2 = 0.05


# ----------------------------------------------------------------------------- data, models

def digits_data() -> dict[str, Any]:
    """The digits split 80/20 (numpy seed 0), pixels standardised on the training part."""
    import torch
    from sklearn.datasets import load_digits

    x, y = load_digits(return_X_y=True)
    perm = np.random.default_rng(0).permutation(len(y))
    x, y = x[perm].astype(np.float64), y[perm]
    n_train = int(0.8 * len(y))
    mean = x[:n_train].mean(axis=0)
    std = x[:n_train].std(axis=0)
    x = (x - mean) / np.where(std > 0, std, 1.0)
    x[:, std == 0] = 0.0
    q_input = float(np.mean(x[:n_train] ** 2))
    tx = torch.tensor(x, dtype=torch.float32)
    ty = torch.tensor(y, dtype=torch.long)
    return {"x_train": tx[:n_train], "y_train": ty[:n_train], "x_test": tx[n_train:],
            "y_test": ty[n_train:], "q_input": q_input}


def torch_activation(name: str) -> Any:
    """The torch module of a built-in activation name used here."""
    import torch

    return {"tanh": torch.nn.Tanh, "gelu": torch.nn.GELU, "relu": torch.nn.ReLU}[name]()


def plain_network(act: str, depth: int, width: int, n_in: int = 64) -> Any:
    """``depth`` hidden Linear + activation layers of ``width`` units, then a Linear readout.

    Built under the current torch seed, so torch's default initialisation is reproducible
    through ``torch.manual_seed``.
    """
    import torch

    mods: list[Any] = []
    fan_in = n_in
    for _ in range(depth):
        mods += [torch.nn.Linear(fan_in, width), torch_activation(act)]
        fan_in = width
    mods.append(torch.nn.Linear(fan_in, N_CLASSES))
    return torch.nn.Sequential(*mods)


def linear_layers(model: Any) -> list[Any]:
    import torch

    return [m for m in model.modules() if isinstance(m, torch.nn.Linear)]


def init_gaussian(model: Any, sigma_w2: float, sigma_b2: float, seed: int,
                  first_sigma_w2: float | None = None) -> Any:
    """Weights N(0, sigma_w2 / fan_in), biases N(0, sigma_b2), in every Linear layer."""
    import torch

    gen = torch.Generator().manual_seed(seed)
    with torch.no_grad():
        for i, lin in enumerate(linear_layers(model)):
            sw = first_sigma_w2 if (i == 0 and first_sigma_w2 is not None) else sigma_w2
            fan_in = lin.weight.shape[1]
            lin.weight.copy_(torch.randn(lin.weight.shape, generator=gen) * math.sqrt(sw / fan_in))
            lin.bias.copy_(torch.randn(lin.bias.shape, generator=gen) * math.sqrt(sigma_b2))
    return model


def init_fixed_gain(model: Any, gain: float, seed: int) -> Any:
    """Weights N(0, gain^2 / fan_in), zero biases (a fixed gain, the customary practice)."""
    init_gaussian(model, gain * gain, 0.0, seed)
    return model


def widths_of(depth: int, width: int, n_in: int = 64) -> list[int]:
    return [n_in] + [width] * depth + [N_CLASSES]


def plan_for(act: str, depth: int, width: int, q_input: float, **kwargs: Any) -> Any:
    """``propcalc.recommend`` for the plain network of this harness."""
    return propcalc.recommend(propcalc.activation(act), widths=widths_of(depth, width),
                              q_input=q_input, **kwargs)


def init_plan(model: Any, plan: Any, seed: int) -> Any:
    from propcalc.init.torch_adapter import apply_plan

    return apply_plan(model, plan, seed=seed)


def train(model: Any, data: dict[str, Any], *, steps: int, lr: float, momentum: float = 0.0,
          batch: int = 128, seed: int = 0, record_every: int = 0) -> dict[str, Any]:
    """Train with SGD on softmax cross-entropy; the final accuracies and the loss curve.

    Returns a dict with ``train_acc``, ``test_acc``, ``loss`` (final, whole training part),
    ``initial_loss``, ``diverged`` (the loss became NaN/inf), ``steps_run`` and, if
    ``record_every`` > 0, ``curve``: [(step, minibatch loss)] every that many steps.
    """
    import torch

    x_tr, y_tr = data["x_train"], data["y_train"]
    gen = torch.Generator().manual_seed(1000 + seed)
    opt = torch.optim.SGD(model.parameters(), lr=lr, momentum=momentum)
    loss_fn = torch.nn.CrossEntropyLoss()
    with torch.no_grad():
        initial = float(loss_fn(model(x_tr), y_tr))
    curve: list[tuple[int, float]] = []
    diverged = not math.isfinite(initial)
    step = 0
    while step < steps and not diverged:
        idx = torch.randint(0, len(y_tr), (batch,), generator=gen)
        opt.zero_grad()
        loss = loss_fn(model(x_tr[idx]), y_tr[idx])
        value = float(loss.detach())
        if not math.isfinite(value) or value > 1e4:
            diverged = True
            break
        if record_every and step % record_every == 0:
            curve.append((step, value))
        loss.backward()
        opt.step()
        step += 1
    out: dict[str, Any] = {"initial_loss": initial, "diverged": diverged, "steps_run": step}
    with torch.no_grad():
        out_tr = model(x_tr)
        final = float(loss_fn(out_tr, y_tr))
        if diverged or not math.isfinite(final):
            out.update(loss=None, train_acc=None, test_acc=None, diverged=True)
        else:
            out_te = model(data["x_test"])
            out.update(loss=final,
                       train_acc=float((out_tr.argmax(1) == y_tr).float().mean()),
                       test_acc=float((out_te.argmax(1) == data["y_test"]).float().mean()))
    if record_every:
        out["curve"] = curve
    return out


def trains(result: dict[str, Any], threshold: float) -> bool:
    """The criterion of this harness: not diverged and training accuracy >= threshold."""
    return (not result["diverged"]) and result["train_acc"] is not None \
        and result["train_acc"] >= threshold


# ----------------------------------------------------------------------------- parts

def part_map(data: dict[str, Any], args: argparse.Namespace) -> dict[str, Any]:
    import torch

    cells = []
    agree = 0
    t_all = time.process_time()
    for sw in args.map_sigma_w2:
        p = propcalc.propagation("tanh", sw, MAP_SIGMA_B2, q_input=data["q_input"])
        limit = p.trainable_depth
        for depth in args.map_depths:
            torch.manual_seed(args.map_seed)
            model = init_gaussian(plain_network("tanh", depth, args.width), sw, MAP_SIGMA_B2,
                                  args.map_seed)
            t0 = time.process_time()
            res = train(model, data, steps=args.map_steps, lr=args.map_lr,
                        momentum=args.map_momentum, batch=args.batch, seed=args.map_seed)
            ok = trains(res, args.threshold)
            predicted = limit is None or depth <= limit
            agree += ok == predicted
            cell = {"sigma_w2": sw, "depth": depth, "xi_c": p.xi_c,
                    "predicted_depth": limit, "predicted_trains": predicted, "trains": ok,
                    "cpu_seconds": time.process_time() - t0, **res}
            cells.append(cell)
            acc = "diverged" if res["diverged"] else f"{res['train_acc']:.3f}"
            print(f"map sigma_w2 {sw:5.2f} depth {depth:4d} 6 xi_c {limit:8.1f} "
                  f"predicted {'train' if predicted else 'fail ':5s} train acc {acc:8s} "
                  f"{'agree' if ok == predicted else 'DISAGREE'} "
                  f"({cell['cpu_seconds']:.0f} s)", flush=True)
    entry = {
        "activation": "tanh", "sigma_b2": MAP_SIGMA_B2, "width": args.width,
        "steps": args.map_steps, "lr": args.map_lr, "momentum": args.map_momentum,
        "batch": args.batch, "seed": args.map_seed, "threshold": args.threshold,
        "q_input": data["q_input"], "cells": cells, "agree": agree, "total": len(cells),
        "cpu_seconds": time.process_time() - t_all,
    }
    print(f"map: prediction and training agree in {agree} of {len(cells)} cells")
    suffix = "" if args.map_seed == 0 else f"_seed{args.map_seed}"
    _draw_map(entry, Path(args.out) / f"trainability_map{suffix}.png")
    return entry


def loss_plan(act: str, depth: int, data: dict[str, Any], args: argparse.Namespace,
              momentum: float) -> Any:
    """``recommend`` for softmax cross-entropy on 10 classes at this harness's batch size,
    with the first ``--kernel-inputs`` training inputs as the batch the kernel is computed on."""
    x = data["x_train"][:args.kernel_inputs].numpy().astype(np.float64)
    return plan_for(act, depth, args.width, data["q_input"], loss="cross_entropy",
                    n_classes=N_CLASSES, batch_size=args.batch, momentum=momentum, inputs=x)


def _ceiling_fields(plan: Any) -> dict[str, Any]:
    return {"learning_rate_ceiling": plan.learning_rate_ceiling,
            "learning_rate": plan.learning_rate,
            "lambda_max": plan.learning_rate_details.lambda_max,
            "catapult_limit": plan.learning_rate_details.catapult_limit,
            "learning_rate_rule": plan.learning_rate_details.learning_rate_rule,
            "readout_sigma_w2": plan.layers[-1].sigma_w2}


def part_ceilings(data: dict[str, Any], args: argparse.Namespace,
                  results: dict[str, Any]) -> dict[str, Any]:
    """Add to every cell of the stored map the learning-rate ceiling of its network for the
    map's optimiser (``propcalc.training.learning_rate_ceiling``, heavy-ball momentum, the
    batch of ``--kernel-inputs`` training inputs) and the map's lr over it; no training."""
    from propcalc.training import learning_rate_ceiling

    entry = results["map"]
    x = data["x_train"][:args.kernel_inputs].numpy().astype(np.float64)
    for cell in entry["cells"]:
        ceiling = learning_rate_ceiling(
            "tanh", widths_of(cell["depth"], entry["width"]), cell["sigma_w2"], entry["sigma_b2"],
            loss="cross_entropy", batch_size=entry["batch"], n_classes=N_CLASSES, inputs=x,
            momentum=entry["momentum"])
        cell["learning_rate_ceiling"] = ceiling.learning_rate_ceiling
        cell["lr_over_ceiling"] = entry["lr"] / ceiling.learning_rate_ceiling
        print(f"ceiling sigma_w2 {cell['sigma_w2']:5.2f} depth {cell['depth']:4d} "
              f"{ceiling.learning_rate_ceiling:.4g} (map lr / ceiling "
              f"{cell['lr_over_ceiling']:.3g}) trains {cell['trains']}", flush=True)
    _draw_map(entry, Path(args.out) / "trainability_map.png")
    return entry


def part_defaults(data: dict[str, Any], args: argparse.Namespace) -> dict[str, Any]:
    import torch

    runs = []
    plans = {}
    t_all = time.process_time()
    for act, depth, gain, gain_source in (
            ("tanh", args.tanh_depth, 5.0 / 3.0, "torch.nn.init.calculate_gain('tanh')"),
            ("gelu", args.gelu_depth, math.sqrt(2.0),
             "torch.nn.init.calculate_gain('relu') (He et al. 2015; gelu is not listed)")):
        plan = loss_plan(act, depth, data, args, args.defaults_momentum)
        plans[act] = {"depth": depth, **_ceiling_fields(plan)}
        inits: list[tuple[str, Callable[[Any, int], Any]]] = [
            ("torch default", lambda m, s: m),
            (f"fixed gain {gain:.4g}", lambda m, s, g=gain: init_fixed_gain(m, g, s)),
            ("propcalc plan", lambda m, s, pl=plan: init_plan(m, pl, s)),
        ]
        for lr_spec in args.defaults_lrs:
            lr = plan.learning_rate if lr_spec == "plan" else float(lr_spec)
            for name, init in inits:
                for seed in args.seeds:
                    torch.manual_seed(seed)
                    model = init(plain_network(act, depth, args.width), seed)
                    t0 = time.process_time()
                    res = train(model, data, steps=args.defaults_steps, lr=lr,
                                momentum=args.defaults_momentum, batch=args.batch, seed=seed,
                                record_every=args.record_every)
                    run = {"activation": act, "depth": depth, "init": name, "seed": seed,
                           "lr": lr, "lr_from": lr_spec, "cpu_seconds": time.process_time() - t0,
                           **res}
                    if name.startswith("fixed gain"):
                        run["gain_source"] = gain_source
                    runs.append(run)
                    acc = "diverged" if res["diverged"] else \
                        f"{res['train_acc']:.3f} (test {res['test_acc']:.3f})"
                    print(f"defaults {act} depth {depth} lr {lr:.4g} {name:16s} seed {seed} "
                          f"initial loss {res['initial_loss']:.3f} train acc {acc} "
                          f"({run['cpu_seconds']:.0f} s)", flush=True)
    entry = {"width": args.width, "steps": args.defaults_steps, "lrs": args.defaults_lrs,
             "momentum": args.defaults_momentum, "batch": args.batch, "seeds": args.seeds,
             "q_input": data["q_input"], "plans": plans, "runs": runs,
             "cpu_seconds": time.process_time() - t_all}
    _draw_defaults(entry, Path(args.out) / "plan_vs_defaults.png")
    return entry


def part_lr(data: dict[str, Any], args: argparse.Namespace) -> dict[str, Any]:
    import torch

    runs = []
    plans = {}
    t_all = time.process_time()
    for act, depth in zip(args.lr_acts, args.lr_depths):
        plan = loss_plan(act, depth, data, args, 0.0)
        plans[f"{act} {depth}"] = {"activation": act, "depth": depth, **_ceiling_fields(plan)}
        for factor in args.lr_factors:
            lr = factor * plan.learning_rate_ceiling
            for seed in args.lr_seeds:
                torch.manual_seed(seed)
                model = init_plan(plain_network(act, depth, args.width), plan, seed)
                t0 = time.process_time()
                res = train(model, data, steps=args.lr_steps, lr=lr, momentum=0.0,
                            batch=args.batch, seed=seed)
                run = {"activation": act, "depth": depth, "seed": seed, "lr": lr,
                       "lr_over_ceiling": factor, "cpu_seconds": time.process_time() - t0,
                       **res}
                runs.append(run)
                acc = "diverged" if res["diverged"] else \
                    f"{res['train_acc']:.3f} (test {res['test_acc']:.3f})"
                print(f"lr {act} depth {depth} lr {lr:.4g} = {factor:g} x ceiling seed {seed} "
                      f"train acc {acc} ({run['cpu_seconds']:.0f} s)", flush=True)
    entry = {"width": args.width, "steps": args.lr_steps, "momentum": 0.0,
             "batch": args.batch, "seeds": args.lr_seeds, "threshold": args.threshold,
             "q_input": data["q_input"], "kernel_inputs": args.kernel_inputs,
             "plans": plans, "runs": runs, "cpu_seconds": time.process_time() - t_all}
    _draw_lr(entry, Path(args.out) / "learning_rate.png")
    return entry


# ----------------------------------------------------------------------------- figures

def _figure(nrows: int = 1, ncols: int = 1, size: tuple[float, float] = (6.4, 4.8)) -> Any:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt.subplots(nrows, ncols, figsize=size, squeeze=False)


def _save(fig: Any, path: Path) -> None:
    import matplotlib.pyplot as plt

    path.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(path, dpi=110, bbox_inches="tight", metadata={"Software": None})
    plt.close(fig)
    print(f"wrote {path}")


def _draw_map(entry: dict[str, Any], path: Path) -> None:
    fig, axes = _figure()
    ax = axes[0][0]
    cells = entry["cells"]
    for c in cells:
        acc = 0.0 if c["train_acc"] is None else c["train_acc"]
        ax.scatter(c["sigma_w2"], c["depth"], s=140, c=[[1 - acc, acc, 0.2]],
                   marker="o" if c["trains"] else "x", linewidths=2.0)
        if c["trains"] != c["predicted_trains"]:
            ax.scatter(c["sigma_w2"], c["depth"], s=320, facecolors="none", edgecolors="k")
    grid = np.linspace(min(c["sigma_w2"] for c in cells), max(c["sigma_w2"] for c in cells), 200)
    limits = [propcalc.propagation("tanh", s, entry["sigma_b2"],
                                   q_input=entry["q_input"]).trainable_depth for s in grid]
    ax.plot(grid, limits, "k-", label="predicted trainable depth 6 xi_c (propcalc)")
    edge = propcalc.edge_of_chaos_at_bias("tanh", entry["sigma_b2"])[0].sigma_w2
    ax.axvline(edge, color="k", ls=":", lw=1, label=f"edge of chaos, sigma_w2 = {edge:.3f}")
    over = [c for c in cells if c.get("lr_over_ceiling", 0.0) > 1.0]
    if over:
        ax.scatter([c["sigma_w2"] for c in over], [c["depth"] for c in over], s=12, c="k",
                   marker="^", label="lr above the predicted ceiling (momentum %g)"
                   % entry["momentum"])
    ax.set_ylim(0, 1.35 * max(c["depth"] for c in cells))
    ax.set_xlabel("sigma_w2 (sigma_b2 = %g)" % entry["sigma_b2"])
    ax.set_ylabel("depth (hidden layers)")
    ax.set_title(f"tanh, width {entry['width']}, digits: o trains (train acc >= "
                 f"{entry['threshold']:g}), x does not\n{entry['agree']} of {entry['total']} "
                 f"cells agree with the prediction (circled: disagree)", fontsize=9)
    ax.legend(loc="upper right", fontsize=8)
    _save(fig, path)


def _draw_defaults(entry: dict[str, Any], path: Path) -> None:
    acts = sorted({r["activation"] for r in entry["runs"]}, reverse=True)
    specs = list(entry["lrs"])
    fig, axes = _figure(len(specs), len(acts), (5.2 * len(acts), 3.9 * len(specs)))
    colours = {"torch default": "tab:gray", "propcalc plan": "tab:blue"}
    for row, spec in zip(axes, specs):
        for ax, act in zip(row, acts):
            runs = [r for r in entry["runs"] if r["activation"] == act and r["lr_from"] == spec]
            seen = set()
            for r in runs:
                colour = colours.get(r["init"], "tab:orange")
                steps, losses = zip(*r["curve"]) if r["curve"] else ((0,), (float("nan"),))
                label = None
                if r["init"] not in seen:
                    seen.add(r["init"])
                    accs = [x["train_acc"] or 0.0 for x in runs if x["init"] == r["init"]]
                    label = f"{r['init']}: train acc {np.mean(accs):.2f} ({len(accs)} seeds)"
                ax.plot(steps, losses, color=colour, lw=1, alpha=0.8, label=label)
            ax.axhline(math.log(N_CLASSES), color="k", ls=":", lw=1, label="ln 10")
            ax.set_yscale("log")
            ax.set_xlabel("SGD step (momentum %g)" % entry["momentum"])
            ax.set_ylabel("minibatch loss")
            source = "the plan's learning_rate" if spec == "plan" else "fixed"
            ax.set_title(f"{act}, depth {runs[0]['depth']}, width {entry['width']}, "
                         f"lr {runs[0]['lr']:.3g} ({source})", fontsize=9)
            ax.legend(fontsize=7)
    _save(fig, path)


def _draw_lr(entry: dict[str, Any], path: Path) -> None:
    keys = list(dict.fromkeys(f"{r['activation']} {r['depth']}" for r in entry["runs"]))
    fig, axes = _figure(1, len(keys), (5.2 * len(keys), 4.2))
    for ax, key in zip(axes[0], keys):
        plan = entry["plans"][key]
        runs = [r for r in entry["runs"] if f"{r['activation']} {r['depth']}" == key]
        factors = sorted({r["lr_over_ceiling"] for r in runs})
        lrs = [f * plan["learning_rate_ceiling"] for f in factors]
        means = []
        for f, lr in zip(factors, lrs):
            same = [r for r in runs if r["lr_over_ceiling"] == f]
            accs = [0.0 if r["train_acc"] is None else r["train_acc"] for r in same]
            means.append(np.mean(accs))
            for r, a in zip(same, accs):
                ax.scatter(lr, a, marker="x" if r["diverged"] else "o", c="tab:blue", s=25)
        ax.plot(lrs, means, "-", color="tab:blue", lw=1,
                label="training accuracy, line: mean of the seeds (x: diverged)")
        ax.axvline(plan["learning_rate_ceiling"], color="tab:red",
                   label=f"ceiling 2 / lambda_max = {plan['learning_rate_ceiling']:.3g}")
        ax.axvline(plan["catapult_limit"], color="tab:red", ls="--",
                   label=f"4 / lambda_max = {plan['catapult_limit']:.3g}")
        ax.axvline(plan["learning_rate"], color="tab:green", ls=":",
                   label=f"recommended {plan['learning_rate']:.3g}")
        ax.axhline(entry["threshold"], color="k", ls=":", lw=0.8)
        ax.set_xscale("log")
        ax.set_ylim(0, 1.02)
        ax.set_xlabel("learning rate (SGD, no momentum)")
        ax.set_ylabel(f"training accuracy after {entry['steps']} steps")
        ax.set_title(f"{plan['activation']}, depth {plan['depth']}, width {entry['width']}, "
                     f"propcalc plan, seeds {entry['seeds']}", fontsize=9)
        ax.legend(fontsize=7, loc="best", framealpha=0.7)
    _save(fig, path)


# ----------------------------------------------------------------------------- main

def _parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--parts", nargs="+", choices=("map", "ceilings", "lr", "defaults"),
                   default=["map", "defaults", "lr"])
    p.add_argument("--out", default="docs/figures")
    p.add_argument("--width", type=int, default=128)
    p.add_argument("--batch", type=int, default=128)
    p.add_argument("--seeds", type=int, nargs="+", default=[0, 1, 2])
    p.add_argument("--threshold", type=float, default=0.5)
    p.add_argument("--map-sigma-w2", type=float, nargs="+",
                   default=[1.0, 1.25, 1.5, 1.75, 2.0, 2.5, 3.0, 4.0])
    p.add_argument("--map-depths", type=int, nargs="+", default=[10, 20, 40, 70, 100, 150])
    p.add_argument("--map-steps", type=int, default=300)
    p.add_argument("--map-lr", type=float, default=1e-3)
    p.add_argument("--map-momentum", type=float, default=0.9)
    p.add_argument("--map-seed", type=int, default=0)
    p.add_argument("--tanh-depth", type=int, default=100)
    p.add_argument("--gelu-depth", type=int, default=64)
    p.add_argument("--defaults-steps", type=int, default=500)
    p.add_argument("--defaults-lrs", nargs="+", default=["0.001", "plan"],
                   help="learning rates for all three initialisations; 'plan': the plan's "
                        "recommended learning_rate (for the momentum used)")
    p.add_argument("--defaults-momentum", type=float, default=0.9)
    p.add_argument("--record-every", type=int, default=10)
    p.add_argument("--kernel-inputs", type=int, default=512,
                   help="training inputs given to recommend(..., inputs=) for the ceiling")
    p.add_argument("--lr-acts", nargs="+", default=["tanh", "tanh", "gelu"])
    p.add_argument("--lr-depths", type=int, nargs="+", default=[20, 100, 64])
    p.add_argument("--lr-factors", type=float, nargs="+",
                   default=[2.0 ** k for k in range(-7, 3)],
                   help="learning rates as multiples of the plan's ceiling")
    p.add_argument("--lr-steps", type=int, default=300)
    p.add_argument("--lr-seeds", type=int, nargs="+", default=[0, 1])
    return p


def main(argv: Sequence[str] | None = None) -> None:
    import torch

    args = _parser().parse_args(argv)
    torch.set_num_threads(1)
    data = digits_data()
    path = Path(args.out) / "training_results.json"
    results = json.loads(path.read_text()) if path.exists() else {}
    parts = {"map": part_map, "defaults": part_defaults, "lr": part_lr}
    for name in args.parts:
        if name == "ceilings":
            results["map"] = part_ceilings(data, args, results)
            name = "map"
        elif name == "map" and args.map_seed != 0:
            # another seed's map is kept beside seed 0's
            name = f"map_seed{args.map_seed}"
            results[name] = part_map(data, args)
        else:
            results[name] = parts[name](data, args)
        results[name]["torch"] = torch.__version__
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(json.dumps(results, indent=1, sort_keys=True) + "\n")
        print(f"wrote {path}")


if __name__ == "__main__":
    main()
