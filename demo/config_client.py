"""Config generator: ask the propcalc service for an initialisation plan per model config.

Invented scenario: Ossimere Acoustics (a fictional team that builds
audio-event classifiers) keeps one JSON config per model in ``demo/configs/``.
Before a training run, this script sends each config's network and
initialisation wishes to the propcalc service (``POST /v1/plan``) and writes
the plan it gets back, one JSON file per model, to an output directory, as
their training jobs expect. Nothing here reads real data.

Usage::

    python demo/config_client.py                      # starts `propcalc serve` itself
    python demo/config_client.py --url http://127.0.0.1:8000 --out out/plans

A config file looks like::

    {"model": "kestrel-cnn", "description": "...",
     "activation": "relu",                       # or {"name": ..., "params": ...}
                                                 # or {"formula": ..., "params": ...}
     "network": {"widths": [...]} | {"layers": [...]} | {"depth": 48},
     "init": {"distribution": "normal", "target": "edge", "sigma_b2": 0.05}}

Exit status: 0 when every plan was written, 1 when the service refused a
config (its problem details are printed), 2 for usage errors.

Only the standard library is used, so the client runs wherever Python does.
"""

from __future__ import annotations

import argparse
import json
import socket
import subprocess
import sys
import time
import urllib.error
import urllib.request
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from pathlib import Path
from typing import Any, TextIO

__all__ = ["main", "plan_request", "load_configs", "local_service", "PlanClient"]

HERE = Path(__file__).resolve().parent
DEFAULT_CONFIGS = HERE / "configs"
DEFAULT_OUT = Path("out") / "plans"
_NETWORK_KEYS = ("widths", "layers", "depth")
_INIT_KEYS = ("distribution", "target", "sigma_b2", "q_star", "q_input")


class ConfigError(ValueError):
    """A config file that the client cannot turn into a request."""


def load_configs(directory: Path) -> list[tuple[Path, dict[str, Any]]]:
    """Every ``*.json`` config in ``directory``, sorted by file name."""
    if not directory.is_dir():
        raise ConfigError(f"config directory {directory} does not exist")
    out = []
    for path in sorted(directory.glob("*.json")):
        try:
            out.append((path, json.loads(path.read_text(encoding="utf-8"))))
        except json.JSONDecodeError as exc:
            raise ConfigError(f"{path.name}: not valid JSON ({exc.msg} at line {exc.lineno})"
                              ) from None
    if not out:
        raise ConfigError(f"no *.json configs in {directory}")
    return out


def plan_request(config: dict[str, Any], name: str = "config") -> dict[str, Any]:
    """The body of ``POST /v1/plan`` for one config."""
    for key in ("model", "activation", "network"):
        if key not in config:
            raise ConfigError(f"{name}: missing {key!r}")
    network = config["network"]
    if not isinstance(network, dict) or not any(k in network for k in _NETWORK_KEYS):
        raise ConfigError(f"{name}: 'network' needs one of {', '.join(_NETWORK_KEYS)}")
    extra = set(network) - set(_NETWORK_KEYS)
    if extra:
        raise ConfigError(f"{name}: unknown network keys {sorted(extra)}")
    init = config.get("init", {})
    extra = set(init) - set(_INIT_KEYS)
    if extra:
        raise ConfigError(f"{name}: unknown init keys {sorted(extra)}")
    return {"activation": config["activation"], **network, **init}


class PlanClient:
    """A tiny JSON client of the propcalc service (urllib only)."""

    def __init__(self, url: str, timeout: float = 30.0) -> None:
        self.url = url.rstrip("/")
        self.timeout = timeout

    def _call(self, method: str, path: str, body: Any = None) -> tuple[int, Any]:
        data = None if body is None else json.dumps(body).encode("utf-8")
        req = urllib.request.Request(self.url + path, data=data, method=method,
                                     headers={"Content-Type": "application/json",
                                              "Accept": "application/json"})
        try:
            with urllib.request.urlopen(req, timeout=self.timeout) as resp:
                return resp.status, json.loads(resp.read())
        except urllib.error.HTTPError as exc:
            payload = exc.read()
            try:
                return exc.code, json.loads(payload)
            except ValueError:
                return exc.code, {"detail": payload.decode("utf-8", "replace")}

    def healthy(self) -> bool:
        try:
            status, _ = self._call("GET", "/health")
        except (OSError, ValueError):
            return False
        return status == 200

    def plan(self, body: dict[str, Any]) -> tuple[int, Any]:
        """(status, JSON body) of ``POST /v1/plan``."""
        return self._call("POST", "/v1/plan", body)


def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


@contextmanager
def local_service(timeout: float = 60.0) -> Iterator[str]:
    """Run ``propcalc serve`` on a free loopback port for the duration of the block."""
    port = _free_port()
    proc = subprocess.Popen([sys.executable, "-m", "propcalc.cli", "serve", "--host",
                             "127.0.0.1", "--port", str(port)],
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    url = f"http://127.0.0.1:{port}"
    try:
        client = PlanClient(url, timeout=5)
        deadline = time.monotonic() + timeout
        while not client.healthy():
            if proc.poll() is not None:
                err = proc.stderr.read().decode("utf-8", "replace") if proc.stderr else ""
                raise RuntimeError(f"propcalc serve exited with status {proc.returncode}: {err}")
            if time.monotonic() > deadline:
                raise RuntimeError(f"propcalc serve did not answer within {timeout:g} s")
            time.sleep(0.2)
        yield url
    finally:
        proc.terminate()
        try:
            proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait(timeout=10)
        if proc.stderr:
            proc.stderr.close()


def _number(value: Any) -> str:
    return value if isinstance(value, str) else f"{value:.4g}"  # "inf" stays "inf"


def _summary(model: str, plan: dict[str, Any]) -> str:
    p = plan["propagation"]
    q = "-" if plan["q_star"] is None else _number(plan["q_star"])
    text = (f"{model}: {plan['depth']} layers, sigma_w2 = {_number(plan['sigma_w2'])}, "
            f"sigma_b2 = {_number(plan['sigma_b2'])}, q* = {q}, chi_1 = {_number(p['chi_1'])}, "
            f"{p['phase']}")
    return text + ("; OK" if plan["depth_ok"] else f"; CHECK: {plan['verdict']['summary']}")


def _problem_text(status: int, body: Any) -> str:
    if not isinstance(body, dict):
        return f"HTTP {status}"
    lines = [f"HTTP {status}: {body.get('detail', '')}"]
    for e in body.get("errors", []):
        lines.append(f"    {e.get('pointer', e.get('parameter', ''))}: {e.get('detail')}")
    return "\n".join(lines)


def generate(url: str, configs: Path, out_dir: Path, out: TextIO, err: TextIO,
             timeout: float = 30.0) -> int:
    """Request a plan for every config and write ``<model>.json`` files; returns the status."""
    client = PlanClient(url, timeout=timeout)
    out_dir.mkdir(parents=True, exist_ok=True)
    failed = 0
    for path, config in load_configs(configs):
        body = plan_request(config, path.name)
        status, answer = client.plan(body)
        model = str(config["model"])
        if status != 200:
            failed += 1
            err.write(f"{model} ({path.name}) refused: {_problem_text(status, answer)}\n")
            continue
        record = {"model": model, "description": config.get("description", ""),
                  "config": path.name, "request": body, "plan": answer}
        target = out_dir / f"{model}.json"
        target.write_text(json.dumps(record, indent=2, sort_keys=True) + "\n", encoding="utf-8")
        out.write(_summary(model, answer) + f" -> {target}\n")
    return 1 if failed else 0


def main(argv: Sequence[str] | None = None, out: TextIO | None = None,
         err: TextIO | None = None) -> int:
    """Command line entry point; returns the exit status."""
    out = sys.stdout if out is None else out
    err = sys.stderr if err is None else err
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--url", help="a running propcalc service (default: start one locally)")
    parser.add_argument("--configs", type=Path, default=DEFAULT_CONFIGS,
                        help=f"directory of *.json model configs (default {DEFAULT_CONFIGS})")
    parser.add_argument("--out", type=Path, default=DEFAULT_OUT,
                        help=f"where to write the plans (default ./{DEFAULT_OUT})")
    parser.add_argument("--timeout", type=float, default=30.0, help="seconds per request")
    args = parser.parse_args(argv)
    try:
        if args.url:
            return generate(args.url, args.configs, args.out, out, err, args.timeout)
        with local_service() as url:
            out.write(f"started propcalc serve at {url}\n")
            return generate(url, args.configs, args.out, out, err, args.timeout)
    except ConfigError as exc:
        err.write(f"config_client: {exc}\n")
        return 2
    except (OSError, RuntimeError) as exc:
        err.write(f"config_client: cannot reach the service: {exc}\n")
        return 1


if __name__ == "__main__":
    sys.exit(main())
