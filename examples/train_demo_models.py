"""Retrain the bundled demo models and write their checkpoints.

    python examples/train_demo_models.py                      # all models, into attnscope/demo/checkpoints/
    python examples/train_demo_models.py --out /tmp/ckpt      # somewhere else
    python examples/train_demo_models.py --only decoder_only  # one model

Training is seeded, single-threaded and deterministic (see :mod:`attnscope.demo.training`): on the same torch
build and CPU kind the checkpoints come out bit for bit the same; elsewhere within float rounding.
"""

from __future__ import annotations

import argparse
import json
import sys

from attnscope.demo import training


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", default=None, help="directory for the .safetensors files (default: the package's)")
    parser.add_argument("--only", nargs="+", choices=list(training.SETTINGS), help="train only these models")
    args = parser.parse_args(argv)
    reports = training.train_all(args.out, args.only)
    json.dump(reports, sys.stdout, indent=2)
    sys.stdout.write("\n")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
