"""The attnscope command line.

    attnscope demo [--page attnscope-demo.html]      the whole job on the bundled demo models
    attnscope table [TARGET] [--keep maps --csv heads.csv --save run.attnscope]
    attnscope show FILE.attnscope
    attnscope page TARGET --out page.html            standalone dashboard page of one forward
    attnscope check-causal TARGET [--mode exhaustive]
    attnscope check-padding TARGET
    attnscope check-mask TARGET [--window W --layers L | --prefix N] [--mode exhaustive]
    attnscope check-cache TARGET

TARGET is ``package.module:factory``, a callable returning one of:

* a model (an ``nn.Module`` with an ``nn.Embedding``: token-id inputs are made up from its vocabulary);
* ``(model, inputs)``: inputs a tensor or a tuple of positional arguments;
* for the checks, ``(fn, x)`` or ``(fn, x, model)``: ``fn`` any callable of ``x`` (``lambda tgt: model(src, tgt)``
  for a seq2seq decoder), ``model`` the module whose submodules are blamed; for check-padding
  ``(fn, x, pad_mask)`` or ``(fn, x, pad_mask, model)``; for check-mask ``(fn, x, allowed)`` or
  ``(fn, x, allowed, model)`` (``allowed`` a bool ``(T, T)`` / ``(B, T, T)`` tensor or a
  ``(b, h, q_idx, kv_idx)`` predicate), or what check-causal takes plus ``--window`` or ``--prefix``; for
  check-cache an HF-style model, ``(model, ids)``, or ``(step, ids, full)`` / ``(step, ids, full, model)`` for a
  hand-written cached decoder.

Exit codes: 0 success, 1 a check failed, 2 bad usage or an attnscope error (message on stderr).
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


def _capture_target(a: argparse.Namespace, keep: str):
    model, inputs = (builtin_model(a.batch, a.seq, a.seed) if a.target is None
                     else model_and_inputs(load_target(a.target), a.batch, a.seq, a.seed))
    model.eval()
    with torch.no_grad(), attnscope.capture(model, keep=keep) as cap:
        model(*inputs)
    return cap, inputs


def cmd_demo(a: argparse.Namespace) -> int:
    from attnscope.tour import run_tour

    result = run_tour(page=None if a.no_page else a.page, examples=a.examples, seed=a.seed)
    print("\n".join(result.lines))
    return EXIT_OK if result.ok else EXIT_CHECK_FAILED


def cmd_page(a: argparse.Namespace) -> int:
    from attnscope.views import export_html

    cap, inputs = _capture_target(a, "maps")
    ids = inputs[0] if inputs and isinstance(inputs[0], torch.Tensor) and not inputs[0].is_floating_point() else None
    tokens = [[str(int(t)) for t in row] for row in ids] if ids is not None else None
    path = export_html(cap, a.out, tokens=tokens, title=f"attnscope: {a.target or 'built-in model'}")
    print(f"page written to {path}")
    return EXIT_OK


def _check_inputs(a: argparse.Namespace, padding: bool,
                  third: str = "pad_mask") -> tuple[Any, torch.Tensor, Any, nn.Module | None]:
    """``(fn, x, third, model)`` from TARGET: a model, ``(fn, x[, model])`` or ``(fn, x, third[, model])``."""
    target = load_target(a.target)
    if isinstance(target, nn.Module):
        if padding:
            raise OptionError(f"check-{third.replace('_', '-')} needs (fn, x, {third}) from TARGET"
                              + (", to know which positions are padded" if third == "pad_mask" else ""))
        model, (x, *_) = model_and_inputs(target, a.batch, a.seq, a.seed)
        return model, x, None, None
    sizes = (3, 4) if padding else (2, 3)
    if not isinstance(target, tuple) or len(target) not in sizes or not callable(target[0]):
        want = f"(fn, x, {third}[, model])" if padding else "a model or (fn, x[, model])"
        raise OptionError(f"TARGET must give {want}; it gave {type(target).__name__}")
    fn, x = target[0], target[1]
    pad = target[2] if padding else None
    model = target[-1] if len(target) == sizes[1] else None
    return fn, x, pad, model


def _check_options(a: argparse.Namespace) -> dict:
    opts = {"seq_dim": a.seq_dim, "mode": a.mode, "seed": a.seed}
    if a.tol is not None:
        opts["tol"] = a.tol
    if a.vocab is not None:
        opts["vocab_size"] = a.vocab
    return opts


def cmd_check_causal(a: argparse.Namespace) -> int:
    from attnscope.analyses.causality import check_causal

    fn, x, _, model = _check_inputs(a, padding=False)
    report = check_causal(fn, x, model=model, **_check_options(a))
    print(report.summary())
    return EXIT_OK if report.ok else EXIT_CHECK_FAILED


def cmd_check_padding(a: argparse.Namespace) -> int:
    from attnscope.analyses.causality import check_padding

    fn, x, pad, model = _check_inputs(a, padding=True)
    report = check_padding(fn, x, pad, model=model, **_check_options(a))
    print(report.summary())
    return EXIT_OK if report.ok else EXIT_CHECK_FAILED


def cmd_check_mask(a: argparse.Namespace) -> int:
    from attnscope.analyses.contracts import check_mask
    from attnscope.analyses.patterns import prefix_pattern, window_pattern

    built = a.window is not None or a.prefix is not None
    if a.window is not None and a.prefix is not None:
        raise OptionError("give one of --window and --prefix, not both")
    target = load_target(a.target)
    sized = isinstance(target, tuple) and len(target) in (3, 4) and not isinstance(target[2], nn.Module)
    if built == sized:
        raise OptionError("check-mask needs the pattern from TARGET as (fn, x, allowed[, model]) or from "
                          "--window/--prefix with a model or (fn, x[, model]), one of the two")
    fn, x, allowed, model = _check_inputs(a, padding=not built, third="allowed")
    if built:
        T = x.shape[a.seq_dim if a.seq_dim is not None else 1]
        allowed = window_pattern(T, a.window, layers=a.layers) if a.window is not None else prefix_pattern(T, a.prefix)
    report = check_mask(fn, x, allowed, model=model, **_check_options(a))
    print(report.summary())
    return EXIT_OK if report.ok else EXIT_CHECK_FAILED


def cmd_check_cache(a: argparse.Namespace) -> int:
    from attnscope.analyses.cache import check_cache

    target = load_target(a.target)
    if isinstance(target, nn.Module) or (isinstance(target, tuple) and len(target) == 2):
        model, (ids, *_) = model_and_inputs(target, a.batch, a.seq, a.seed)
        step, full = model, None
    elif isinstance(target, tuple) and len(target) in (3, 4) and callable(target[0]):
        step, ids, full = target[:3]
        model = target[3] if len(target) == 4 else None
    else:
        raise OptionError("TARGET must give an HF-style model, (model, ids), (step, ids, full) or "
                          f"(step, ids, full, model); it gave {type(target).__name__}")
    options = {"seq_dim": a.seq_dim} if a.tol is None else {"seq_dim": a.seq_dim, "tol": a.tol}
    report = check_cache(step, ids, full=full, model=model, **options)
    print(report.summary())
    return EXIT_OK if report.ok else EXIT_CHECK_FAILED


def cmd_table(a: argparse.Namespace) -> int:
    cap, _ = _capture_target(a, a.keep)
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


def _inputs_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--batch", type=int, default=2, help="batch size of made-up token inputs (default 2)")
    p.add_argument("--seq", type=int, default=12, help="sequence length of made-up token inputs (default 12)")
    p.add_argument("--seed", type=int, default=0, help="seed for inputs and perturbations (default 0)")


def parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="attnscope", description="See and check what a transformer's attention does.",
        formatter_class=argparse.RawDescriptionHelpFormatter,
        epilog="TARGET is package.module:factory (see `attnscope COMMAND --help`). Exit codes: 0 ok, 1 a check "
               "failed, 2 usage or attnscope error.\nAttention weights are not a faithful explanation of a "
               "model's decisions (Jain & Wallace 2019).")
    sub = p.add_subparsers(dest="command", required=True, metavar="COMMAND")

    d = sub.add_parser("demo", help="the whole job on the bundled demo models: checks, findings, a dashboard page",
                       description="Load the shipped demo models (a warehouse pick-path rewrite), check their "
                                   "causal masking, find their planted dead and duplicate heads, compare post-LN "
                                   "and pre-LN residual norms, and write a standalone dashboard page. Exit 1 if a "
                                   "finding differs from what was planted.")
    d.add_argument("--page", default="attnscope-demo.html", help="where to write the page (default %(default)s)")
    d.add_argument("--no-page", action="store_true", help="do not write the page")
    d.add_argument("--examples", type=int, default=16, help="fresh held-out labels to evaluate on (default 16)")
    d.add_argument("--seed", type=int, default=2024, help="seed of the label generator (default 2024)")
    d.set_defaults(run=cmd_demo)

    t = sub.add_parser("table", help="capture one forward of a model and print its per-head statistics",
                       description="Capture one forward and print one row per (attention call, head).")
    t.add_argument("target", nargs="?", help="package.module:factory giving a model or (model, inputs); "
                                             "default: a built-in tiny seq2seq model")
    _inputs_options(t)
    t.add_argument("--keep", choices=["maps", "stats"], default="stats",
                   help="keep full maps or statistics only (default stats)")
    t.add_argument("--csv", metavar="PATH", help="also write the table as CSV")
    t.add_argument("--save", metavar="PATH", help="also save the capture (no pickle) for `attnscope show`")
    t.set_defaults(run=cmd_table)

    s = sub.add_parser("show", help="print the head table of a saved capture")
    s.add_argument("file", help="a file written by `attnscope table --save` or attnscope.save")
    s.set_defaults(run=cmd_show)

    g = sub.add_parser("page", help="write a standalone dashboard page of one forward of a model",
                       description="Capture one forward of TARGET and write the dashboard as one offline HTML file.")
    g.add_argument("target", nargs="?", help="package.module:factory (default: the built-in tiny model)")
    g.add_argument("--out", default="attnscope-page.html", help="where to write the page (default %(default)s)")
    _inputs_options(g)
    g.set_defaults(run=cmd_page)

    for name, run, what in (("check-causal", cmd_check_causal, "no output position depends on a later input"),
                            ("check-padding", cmd_check_padding, "outputs at real positions ignore padded content"),
                            ("check-mask", cmd_check_mask, "outputs depend only on inputs a declared pattern allows")):
        c = sub.add_parser(name, help=f"behavioural check: {what}; exit 1 on a leak",
                           description=f"Perturb inputs and watch outputs: {what}. Exit 0 when it holds, 1 on a "
                                       "leak (with positions, magnitudes and the module that brings it in).")
        c.add_argument("target", help="package.module:factory giving "
                                      + ("(fn, x, pad_mask[, model])" if name == "check-padding"
                                         else "(fn, x, allowed[, model]), or a model / (fn, x[, model]) with "
                                              "--window or --prefix" if name == "check-mask"
                                         else "a model, (model, inputs) or (fn, x[, model])"))
        c.add_argument("--mode", choices=["screen", "exhaustive"], default="screen",
                       help="screen: O(log T) forwards; exhaustive: the full dependency matrix (default screen)")
        c.add_argument("--seq-dim", type=int, default=None,
                       help="axis of x and of the output holding positions (default: inferred, or refused)")
        if name == "check-mask":
            c.add_argument("--window", type=int, help="declare a causal sliding window of W keys (query included)")
            c.add_argument("--layers", type=int, default=1, help="layers of that window stacked (reach L·(W−1)+1)")
            c.add_argument("--prefix", type=int, help="declare a prefix-LM pattern: the first N positions see "
                                                      "each other, causal after")
        c.add_argument("--tol", type=float, help="change counted as dependence, relative to the output scale")
        c.add_argument("--vocab", type=int, help="vocabulary size for token-id inputs (default: from the model)")
        _inputs_options(c)
        c.set_defaults(run=run)

    k = sub.add_parser("check-cache", help="cached decoding gives the full forward's outputs; exit 1 when not",
                       description="Decode TARGET's ids chunk by chunk with its key/value cache under several chunk "
                                   "schedules and compare every position with one full forward. Exit 0 when they "
                                   "agree, 1 when not (with the first position, the size and the module blamed).")
    k.add_argument("target", help="package.module:factory giving an HF-style model, (model, ids), "
                                  "(step, ids, full) or (step, ids, full, model)")
    k.add_argument("--seq-dim", type=int, default=1, help="axis of the output that lines up with the positions")
    k.add_argument("--tol", type=float, help="difference counted as disagreement, relative to the output scale")
    _inputs_options(k)
    k.set_defaults(run=cmd_check_cache)
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
