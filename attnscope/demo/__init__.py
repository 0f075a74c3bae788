"""Tiny demo models of an invented task, trained by our own script and shipped with the package.

The task (:mod:`attnscope.demo.task`): warehouse bin labels ``"R3 S12 B7"`` rewritten into pick-path order
``"B7-S12-R3"``, with each output token's source token known. The models, one file each:

* ``seq2seq_post_ln``: encoder–decoder on ``nn.Transformer``, post-LN (:mod:`~attnscope.demo.seq2seq_post_ln`);
* ``seq2seq_pre_ln``: the same task, hand-written pre-LN blocks calling SDPA (:mod:`~attnscope.demo.seq2seq_pre_ln`);
* ``decoder_only`` and ``decoder_only_leaky``: a decoder-only model, and its twin trained with an off-by-one
  causal mask (:mod:`~attnscope.demo.decoder_only`);
* ``heads_specimen``: ``decoder_only`` with planted uniform, silent, duplicate and sink heads
  (:mod:`~attnscope.demo.heads_specimen`, the plants listed in ``PLANTED``).

>>> from attnscope import demo
>>> model = demo.load("decoder_only_leaky")
>>> model.config.leaky_mask
True

Retrain them with ``python examples/train_demo_models.py`` (:mod:`attnscope.demo.training`).
"""

from attnscope.demo.shipped import NAMES, checkpoint_path, load, metadata

__all__ = ["NAMES", "checkpoint_path", "load", "metadata"]
