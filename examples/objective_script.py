#!/usr/bin/env python
"""Example external objective for ``warmstart tune --command`` (invented scenario).

Scenario (fictional): the demand-forecasting team of "Larkspur Grocers", an
invented chain, scores a smoothing model for one store. The "training" here
is a made-up formula so the example runs in milliseconds; a real script
would train a model and print its validation score.

How warmstart calls it: once per config, without a shell, as

    python examples/objective_script.py --alpha 0.3 --window 7 --method "holt"

with the same config as one JSON object on standard input. The script may
read either; this one reads the arguments and checks them against stdin.
It prints a progress line and then the score as a JSON line; a bare number
as the last line works too. A non-zero exit marks the trial failed, and
whatever went to standard error is kept as the trial's error text.

Try it:

    echo '{"alpha": 0.3, "window": 7, "method": "holt"}' | \\
        python examples/objective_script.py --alpha 0.3 --window 7 --method holt
"""

from __future__ import annotations

import argparse
import json
import math
import sys


def score(alpha: float, window: int, method: str) -> float:
    """Invented validation accuracy of the fictional forecast: best near
    alpha = 0.35, window = 14, method = holt."""
    bonus = {"simple": 0.0, "holt": 0.04, "seasonal": 0.02}[method]
    return 0.8 + bonus - 0.6 * (alpha - 0.35) ** 2 - 0.002 * (math.log(window / 14.0)) ** 2 * 10


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--alpha", type=float, required=True)
    parser.add_argument("--window", type=int, required=True)
    parser.add_argument("--method", choices=["simple", "holt", "seasonal"], required=True)
    args = parser.parse_args(argv)
    text = sys.stdin.read()
    if text.strip():
        config = json.loads(text)
        if config.get("window") != args.window:
            print(f"stdin and arguments disagree: {config} vs {vars(args)}", file=sys.stderr)
            return 2
    if args.window < 2:
        print(f"window={args.window} is too short for a smoothing model; need >= 2", file=sys.stderr)
        return 1
    print(f"training forecast for store 'Larkspur #12' with {vars(args)}")
    print(json.dumps({"score": round(score(args.alpha, args.window, args.method), 6)}))
    return 0


if __name__ == "__main__":
    sys.exit(main())
