"""The attnscope command line.

    attnscope table [TARGET] [--batch 2 --seq 12 --keep stats --csv heads.csv --save run.attnscope]
    attnscope show FILE.attnscope

TARGET is ``package.module:factory``: a callable returning a model, or ``(model, inputs)`` where inputs is a
tensor or a tuple of positional arguments. Without TARGET the built-in tiny seq2seq model is used. Exit codes:
0 success, 1 a check failed, 2 bad usage or an attnscope error (message on stderr).
"""

from __future__ import annotations

import argparse
import importlib
import sys
from collections.abc import Sequence
from typing import Any

import torch
from torch import nn

import attnscope
from attnscope.errors import AttnscopeError, OptionError

__all__ = ["main"]

EXIT_OK, EXIT_CHECK_FAILED, EXIT_USAGE = 0, 1, 2


def load_target(spec: str) -> Any:
    """Import ``package.module:attribute`` and call it if callable."""
    if ":" not in spec:
        raise OptionError(f"expected TARGET as 'package.module:factory'; received {spec!r}")
    module_name, _, attr = spec.partition(":")
    sys.path.insert(0, "")  # the current directory, as `python -m` would
    try:
        module = importlib.import_module(module_name)
    except ImportError as err:
        raise OptionError(f"cannot import {module_name!r} from TARGET {spec!r}: {err}") from err
    finally:
        sys.path.pop(0)
    if not hasattr(module, attr):
        names = [n for n in dir(module) if not n.startswith("_")]
        raise OptionError(f"{module_name!r} has no attribute {attr!r}.{attnscope.errors.suggest(attr, names)}")
    obj = getattr(module, attr)
    return obj() if callable(obj) and not isinstance(obj, nn.Module) else obj


def model_and_inputs(target: Any, batch: int, seq: int, seed: int) -> tuple[nn.Module, tuple]:
    """Split what a factory returned into ``(model, args)``; make token-id inputs when only a model came."""
    if isinstance(target, tuple) and len(target) == 2 and isinstance(target[0], nn.Module):
        model, inputs = target
        return model, inputs if isinstance(inputs, tuple) else (inputs,)
    if not isinstance(target, nn.Module):
        raise OptionError(f"TARGET must give an nn.Module or (model, inputs); it gave {type(target).__name__}")
    embeddings = [m for m in target.modules() if isinstance(m, nn.Embedding)]
    if not embeddings:
        raise OptionError(f"{type(target).__name__} has no nn.Embedding, so attnscope cannot make inputs for it; "
                          "let the factory return (model, inputs)")
    g = torch.Generator().manual_seed(seed)
    return target, (torch.randint(0, embeddings[0].num_embeddings, (batch, seq), generator=g),)


def builtin_model(batch: int, seq: int, seed: int) -> tuple[nn.Module, tuple]:
    """A tiny random-weight nn.Transformer seq2seq model and float inputs (no training, no download)."""
    torch.manual_seed(seed)
    model = nn.Transformer(d_model=32, nhead=4, num_encoder_layers=2, num_decoder_layers=2, dim_feedforward=64,
                           dropout=0.0, batch_first=True).eval()
    src, tgt = torch.randn(batch, seq, 32), torch.randn(batch, max(2, seq - 2), 32)
    return model, (src, tgt, None, model.generate_square_subsequent_mask(tgt.size(1)))


def cmd_table(a: argparse.Namespace) -> int:
    model, inputs = (builtin_model(a.batch, a.seq, a.seed) if a.target is None
                     else model_and_inputs(load_target(a.target), a.batch, a.seq, a.seed))
    model.eval()
    with torch.no_grad(), attnscope.capture(model, keep=a.keep) as cap:
        model(*inputs)
    table = cap.head_table()
    if a.csv:
        table.to_csv(a.csv, index=False)
    if a.save:
        attnscope.save(cap, a.save)
    print(_format_table(table))
    _print_residual(cap)
    if a.save:
        print(f"capture saved to {a.save}")
    return EXIT_OK


def cmd_show(a: argparse.Namespace) -> int:
    cap = attnscope.load(a.file)
    print(_format_table(cap.head_table()))
    _print_residual(cap)
    return EXIT_OK


def _format_table(table) -> str:
    shown = table.drop(columns=["nonfinite_rows"]).copy()
    for col in ("entropy", "entropy_ratio", "max_weight", "sink_mass", "mean_distance", "leak_mass"):
        shown[col] = shown[col].map(lambda v: f"{v:.3f}")
    return shown.to_string(index=False)


def _print_residual(cap) -> None:
    if cap.residual:
        print("\nresidual-stream norm (mean over batch and positions) per block:")
        for rec in cap.residual:
            print(f"  {rec.name:<32} {float(rec.norms.mean()):10.3f}")


def parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="attnscope", description="See and check what a transformer's attention does.",
                                epilog="Attention weights are not a faithful explanation of a model's decisions.")
    sub = p.add_subparsers(dest="command", required=True, metavar="COMMAND")
    t = sub.add_parser("table", help="capture one forward of a model and print its per-head statistics",
                       description="Capture one forward and print one row per (attention call, head).")
    t.add_argument("target", nargs="?", help="package.module:factory giving a model or (model, inputs); "
                                             "default: a built-in tiny seq2seq model")
    t.add_argument("--batch", type=int, default=2, help="batch size of made-up token inputs (default 2)")
    t.add_argument("--seq", type=int, default=12, help="sequence length of made-up token inputs (default 12)")
    t.add_argument("--seed", type=int, default=0, help="seed for weights and inputs (default 0)")
    t.add_argument("--keep", choices=["maps", "stats"], default="stats",
                   help="keep full maps or statistics only (default stats)")
    t.add_argument("--csv", metavar="PATH", help="also write the table as CSV")
    t.add_argument("--save", metavar="PATH", help="also save the capture (no pickle) for `attnscope show`")
    t.set_defaults(run=cmd_table)
    s = sub.add_parser("show", help="print the head table of a saved capture")
    s.add_argument("file", help="a file written by `attnscope table --save` or attnscope.save")
    s.set_defaults(run=cmd_show)
    return p


def main(argv: Sequence[str] | None = None) -> int:
    p = parser()
    a = p.parse_args(argv)
    try:
        return a.run(a)
    except AttnscopeError as err:
        print(f"attnscope: {type(err).__name__}: {err}", file=sys.stderr)
        return EXIT_USAGE


if __name__ == "__main__":
    sys.exit(main())
