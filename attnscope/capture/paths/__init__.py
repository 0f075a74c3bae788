"""Attention paths: one module per way a model computes attention weights, each recording what it sees.

=============  ==================================================================================================
module         path
=============  ==================================================================================================
:mod:`.mha`    ``F.multi_head_attention_forward`` (``nn.MultiheadAttention``, ``nn.Transformer*`` layers)
:mod:`.sdpa`   ``F.scaled_dot_product_attention`` (hand-written blocks, HF ``sdpa``)
:mod:`.softmax`  a softmax inside an attention module (HF ``eager``, hand-written ``softmax(q @ kᵀ)``)
:mod:`.tap`    :func:`attnscope.tap`, called by the user's own code
:mod:`.flex`   ``torch.nn.attention.flex_attention.flex_attention`` (``score_mod``, block masks); not routed
               by the function mode (FlexAttention does not pass through it): a wrapper is held in place
=============  ==================================================================================================

A path module defines:

* ``SOURCE``: the ``source`` of its records (``"sdpa"``);
* ``FUNCS``: the torch functions it intercepts (a torch function mode hands each call to it);
* ``on_call(rec, func, args, kwargs)``: run the call, record it on the
  :class:`~attnscope.capture.recorder.Recorder` *rec* (:meth:`~attnscope.capture.recorder.Recorder.frame` says
  which module calls, :meth:`~attnscope.capture.recorder.Recorder.record` keeps it), and return what the caller
  must get (the untouched result).

To add a path: write one module here and add it to :data:`PATHS`. Head interventions
(:mod:`attnscope.analyses.ablation`) see a path when they define ``_on_<SOURCE>``.
"""

from __future__ import annotations

from attnscope.capture.paths import flex, mha, sdpa, softmax, tap

__all__ = ["PATHS", "flex", "mha", "sdpa", "softmax", "tap"]

#: Every path whose ``FUNCS`` the capture intercepts, in the order they are routed.
PATHS = (sdpa, mha, softmax, flex)
