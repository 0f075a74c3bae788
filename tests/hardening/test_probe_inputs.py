"""Bad inputs to the behavioural probes: clear attnscope errors, never a wrong verdict, nothing left behind."""

from __future__ import annotations

import pytest
import torch
import torch.nn.functional as F
from torch import nn

import attnscope
from attnscope.errors import OptionError, ProbeError, ShapeError


class Causal(nn.Module):
    def __init__(self):
        super().__init__()
        torch.manual_seed(0)
        self.emb, self.qkv = nn.Embedding(20, 8), nn.Linear(8, 24)

    def forward(self, ids):
        q, k, v = self.qkv(self.emb(ids)).chunk(3, dim=-1)
        return F.scaled_dot_product_attention(q, k, v, is_causal=True)  # (B, T, D)


IDS = torch.randint(0, 20, (2, 10))


def test_output_without_a_sequence_dimension():
    m = Causal()
    with pytest.raises(ShapeError, match=r"T=10 positions on seq_dim=1.*shape \(2, 8\)"):
        attnscope.check_causal(lambda ids: m(ids).mean(dim=1), IDS)  # (B, D): no positions to compare


def test_seq_dim_pointing_at_the_feature_axis():
    m = Causal()
    with pytest.raises(OptionError, match="seq_dim=2 is out of range for x of shape"):
        attnscope.check_causal(m, IDS, seq_dim=2)  # the ids have no axis 2 (the output's axis 2 holds features)


def test_seq_dim_out_of_range():
    with pytest.raises(OptionError, match="seq_dim=5 is out of range"):
        attnscope.check_causal(Causal(), IDS, seq_dim=5)


def test_output_that_is_not_a_tensor():
    with pytest.raises(ProbeError, match="expected fn to return a tensor.*it returned dict"):
        attnscope.check_causal(lambda ids: {"nothing": 1}, IDS)


def test_sequence_first_output_is_checked_on_the_right_axis():
    m = Causal()
    seq_first = IDS.T.contiguous()  # (T, B) in, (T, B, D) out
    assert attnscope.check_causal(lambda ids: m(ids.T).transpose(0, 1), seq_first, seq_dim=0, batch_dim=1).ok
    leaky = attnscope.check_causal(lambda ids: torch.flip(m(ids.T), dims=[1]).transpose(0, 1), seq_first,
                                   seq_dim=0, batch_dim=1)
    assert not leaky.ok


def test_pad_mask_of_the_wrong_shape():
    m = Causal()
    with pytest.raises(ShapeError, match=r"pad_mask of shape \(B, T\) = \(2, 10\).*got \(2, 9\)"):
        attnscope.check_padding(m, IDS, torch.zeros(2, 9, dtype=torch.bool))


def test_pad_mask_with_nothing_padded_says_there_is_nothing_to_probe():
    with pytest.raises(OptionError, match="marks no position as padding"):
        attnscope.check_padding(Causal(), IDS, torch.zeros(2, 10, dtype=torch.bool))


def test_token_ids_outside_the_vocabulary():
    with pytest.raises(ProbeError, match="vocab_size=3 is too small for x"):
        attnscope.check_causal(Causal(), IDS, vocab_size=3)  # ids up to 19 but a vocabulary of 3


def test_model_modes_restored_after_a_failing_probe():
    m = Causal().train()
    with pytest.raises(AssertionError):
        attnscope.assert_causal(lambda ids: torch.flip(m(ids), dims=[1]), IDS, model=m)  # future to the past
    assert m.training
    assert all(not mod._forward_hooks for mod in m.modules())
