"""The shipped demo checkpoints: their names, their files, and loading them without pickle.

Each checkpoint is one safetensors file in ``attnscope/demo/checkpoints/``: the model's weights, plus text
metadata holding the model's config and how it was trained. Loading reads tensors only (no pickle, no code).

>>> from attnscope.demo import shipped
>>> model = shipped.load("seq2seq_pre_ln")
>>> model.training, model.config.d_model
(False, 32)
"""

from __future__ import annotations

import json
from dataclasses import asdict, fields
from pathlib import Path
from typing import Any

from torch import nn

from attnscope.demo.decoder_only import DecoderOnly, DecoderOnlyConfig
from attnscope.demo.seq2seq_post_ln import PostLNConfig, PostLNSeq2Seq
from attnscope.demo.seq2seq_pre_ln import PreLNConfig, PreLNSeq2Seq
from attnscope.errors import OptionError, suggest

__all__ = ["CHECKPOINT_DIR", "NAMES", "build", "checkpoint_path", "load", "metadata", "save"]

CHECKPOINT_DIR = Path(__file__).with_name("checkpoints")
FORMAT = "attnscope-demo-checkpoint/1"

# name -> (model class, config class, config overrides)
_MODELS: dict[str, tuple[type[nn.Module], type, dict[str, Any]]] = {
    "seq2seq_post_ln": (PostLNSeq2Seq, PostLNConfig, {}),
    "seq2seq_pre_ln": (PreLNSeq2Seq, PreLNConfig, {}),
    "decoder_only": (DecoderOnly, DecoderOnlyConfig, {}),
    "decoder_only_leaky": (DecoderOnly, DecoderOnlyConfig, {"leaky_mask": True}),
    "heads_specimen": (DecoderOnly, DecoderOnlyConfig, {}),
}

#: Names of the shipped demo models, in the order a report lists them.
NAMES: tuple[str, ...] = tuple(_MODELS)


def _check(name: str) -> None:
    if name not in _MODELS:
        raise OptionError(f"expected a demo model name, one of {list(NAMES)}; received {name!r}." + suggest(name, NAMES))


def build(name: str) -> nn.Module:
    """A freshly initialised (untrained) model of the demo model *name*, with its shipped config."""
    _check(name)
    cls, config_cls, overrides = _MODELS[name]
    return cls(config_cls(**overrides))


def checkpoint_path(name: str, directory: str | Path | None = None) -> Path:
    """Where the checkpoint of *name* lives (in *directory*, default the package's ``checkpoints/``)."""
    _check(name)
    return Path(directory or CHECKPOINT_DIR) / f"{name}.safetensors"


def save(model: nn.Module, name: str, directory: str | Path | None = None, extra: dict[str, Any] | None = None) -> Path:
    """Write *model*'s weights and config as the checkpoint of *name*; returns the file's path.

    All metadata goes into one JSON text entry (``"attnscope"``), keys sorted, so the same weights always
    give the same bytes.
    """
    from safetensors.torch import save_file

    path = checkpoint_path(name, directory)
    path.parent.mkdir(parents=True, exist_ok=True)
    meta = {"format": FORMAT, "name": name, "config": asdict(model.config), **(extra or {})}
    tensors = {k: v.detach().contiguous() for k, v in model.state_dict().items()}
    save_file(tensors, str(path), metadata={"attnscope": json.dumps(meta, sort_keys=True)})
    return path


def metadata(name: str, directory: str | Path | None = None) -> dict[str, Any]:
    """The checkpoint's metadata: ``format``, ``name``, ``config``, and from training ``settings``, ``report``, ``torch``."""
    from safetensors import safe_open

    path = checkpoint_path(name, directory)
    with safe_open(str(path), framework="pt") as f:
        raw = (f.metadata() or {}).get("attnscope")
    if raw is None:
        raise OptionError(f"expected a {FORMAT} checkpoint in {path}; it has no attnscope metadata")
    return json.loads(raw)


def load(name: str, directory: str | Path | None = None) -> nn.Module:
    """The demo model *name* with its shipped weights, in eval mode; its config is ``model.config``.

    Args:
        name: one of :data:`NAMES`.
        directory: read the checkpoint from here instead of the package (e.g. after retraining).

    Returns:
        The model (``nn.Module``) in eval mode.
    """
    from safetensors.torch import load_file

    path = checkpoint_path(name, directory)
    meta = metadata(name, directory)
    if meta.get("format") != FORMAT or meta.get("name") != name:
        raise OptionError(f"expected a {FORMAT} checkpoint of {name!r} in {path}; found {meta.get('format')!r} "
                          f"of {meta.get('name')!r}")
    cls, config_cls, _ = _MODELS[name]
    known = {f.name for f in fields(config_cls)}
    if set(meta["config"]) != known:
        raise OptionError(f"expected the config fields {sorted(known)} in {path}; found {sorted(meta['config'])}")
    model = cls(config_cls(**meta["config"]))
    model.load_state_dict(load_file(str(path)), strict=True)
    return model.eval()
