"""Helpers of the store tests, and the program their subprocesses run.

The subprocess commands (``python tests/store/procs.py <command> ...``):

* ``publish``: open a store, wait at an optional start line (``--ready`` file written, ``--go`` file
  awaited), publish ``--count`` versions (``--forever`` keeps going until killed), print each number.
* ``fault``: open a store and publish once, SIGKILLing itself at the named protocol step.
* ``load``: load one version and print its predictions on fixed inputs as hex floats (bit-exact).
* ``claim``: claim jobs until none is left; print the ids.
* ``predict``: load one version with the engine's loader (the real one) and print, as hex floats, its
  predictions on the columns stored in ``--inputs`` (an .npz read without pickle).
"""

from __future__ import annotations

import argparse
import json
import os
import signal
import sys
import time
from pathlib import Path

import numpy as np


class LinearModel:
    """A minimal real model for testing the store without the engine: y = X @ coef + intercept."""

    def __init__(self, coef: np.ndarray, intercept: float):
        self.coef = coef
        self.intercept = intercept

    def predict(self, X) -> np.ndarray:
        return np.asarray(X, dtype=float) @ self.coef + self.intercept


def linear_loader(body: dict, arrays: dict) -> LinearModel:
    return LinearModel(arrays["coef"], body["intercept"])


def linear_artifact(n_terms: int = 4, seed: int = 0, intercept: float = 0.5) -> tuple[dict, dict]:
    rng = np.random.default_rng(seed)
    body = {"intercept": intercept, "cv_summary": {"terms": n_terms, "seed": seed}, "spec": {"basis": "linear"}}
    return body, {"coef": rng.normal(size=n_terms), "scale": np.ones(n_terms)}


def _open(args):
    from service.settings import Settings
    from service.store import Store

    settings = Settings(store=Path(args.store), database_url=args.url or None)
    return Store(settings, model_loader=linear_loader)


def main(argv: list[str]) -> int:
    p = argparse.ArgumentParser()
    p.add_argument("command", choices=["publish", "fault", "load", "claim", "predict"])
    p.add_argument("--store", required=True)
    p.add_argument("--url", default="")
    p.add_argument("--name", default="m")
    p.add_argument("--count", type=int, default=1)
    p.add_argument("--forever", action="store_true")
    p.add_argument("--terms", type=int, default=4)
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--ready", default="")
    p.add_argument("--go", default="")
    p.add_argument("--step", default="")
    p.add_argument("--version", type=int, default=1)
    p.add_argument("--worker", default="w")
    p.add_argument("--inputs", default="")
    args = p.parse_args(argv)

    if args.command == "predict":
        from service.settings import Settings
        from service.store import Store

        store = Store(Settings(store=Path(args.store), database_url=args.url or None))
        loaded = store.load(args.name, args.version)
        with np.load(args.inputs, allow_pickle=False) as npz:
            data = {k: npz[k] for k in npz.files}
        print(json.dumps({"checksum": loaded.checksum,
                          "predictions": [float(v).hex() for v in loaded.model.predict(data)]}))
        store.close()
        return 0

    store = _open(args)
    if args.ready:
        Path(args.ready).write_text("ready")
    if args.go:
        deadline = time.monotonic() + 60
        while not os.path.exists(args.go):
            if time.monotonic() > deadline:
                print("no go signal", file=sys.stderr)
                return 3
            time.sleep(0.001)

    if args.command == "publish":
        print("ready", flush=True)
        i = 0
        while args.forever or i < args.count:
            body, arrays = linear_artifact(args.terms, seed=args.seed + i)
            row = store.publish(args.name, body, arrays)
            print(row["version"], flush=True)
            i += 1
    elif args.command == "fault":
        import service.store.store as store_module

        def fault_point(step: str) -> None:
            if step == args.step:
                os.kill(os.getpid(), signal.SIGKILL)

        store_module._fault_point = fault_point
        body, arrays = linear_artifact(args.terms, seed=args.seed)
        store.publish(args.name, body, arrays)
        print("step never reached", file=sys.stderr)
        return 4
    elif args.command == "load":
        loaded = store.load(args.name, args.version)
        X = np.random.default_rng(123).normal(size=(50, loaded.model.coef.shape[0]))
        print(json.dumps({"checksum": loaded.checksum,
                          "predictions": [float(v).hex() for v in loaded.model.predict(X)]}))
    elif args.command == "claim":
        claimed = []
        while (job := store.jobs.claim(args.worker)) is not None:
            claimed.append(job["id"])
        print(json.dumps(claimed))
    store.close()
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
