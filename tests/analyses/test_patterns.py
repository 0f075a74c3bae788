"""Pattern builders against torch FlexAttention's ``create_mask`` on the same mask_mod, and hand truth tables.

References:
- ``torch.nn.attention.flex_attention.create_mask`` (torch's own evaluation of a ``mask_mod``, device="cpu"),
  given mask_mods written here in FlexAttention's documented style, independent of attnscope;
- truth tables written out by hand below.
"""

from __future__ import annotations

import pytest
import torch
from torch.nn.attention.flex_attention import create_mask

from attnscope.analyses.patterns import (
    all_of,
    any_of,
    as_pattern,
    causal_pattern,
    documents_pattern,
    pattern_from_predicate,
    prefix_pattern,
    window_pattern,
)
from attnscope.errors import OptionError, ShapeError

T = 12


def flex(mask_mod, B: int = 1, n: int = T) -> torch.Tensor:
    """torch's own evaluation of a mask_mod: (B, n, n) bool (head axis 1 of size 1 dropped)."""
    return create_mask(mask_mod, B, 1, n, n, device="cpu")[:, 0]


def test_causal_matches_create_mask() -> None:
    ref = flex(lambda b, h, q, kv: q >= kv)[0]  # reference: create_mask
    assert torch.equal(causal_pattern(T), ref)


@pytest.mark.parametrize("w,layers", [(1, 1), (3, 1), (4, 1), (4, 2), (3, 3), (20, 1)])
def test_window_matches_create_mask(w: int, layers: int) -> None:
    reach = layers * (w - 1)

    def mask_mod(b, h, q, kv):  # the query itself plus `reach` keys before it
        return (q >= kv) & (q - kv <= reach)

    assert torch.equal(window_pattern(T, w, layers=layers), flex(mask_mod)[0])  # reference: create_mask


def test_documents_match_create_mask_per_item() -> None:
    docs = torch.tensor([[0, 0, 0, 1, 1, 1, 1, 2, 2, 2, 2, 2],
                         [0, 0, 0, 0, 0, 0, 1, 1, 1, 1, 1, 1]])

    def mask_mod(b, h, q, kv):
        return (docs[b, q] == docs[b, kv]) & (q >= kv)

    assert torch.equal(documents_pattern(docs), flex(mask_mod, B=2))  # reference: create_mask
    assert torch.equal(documents_pattern(docs[0]), flex(mask_mod, B=1)[0])

    def both_ways(b, h, q, kv):
        return docs[b, q] == docs[b, kv]

    assert torch.equal(documents_pattern(docs, causal=False), flex(both_ways, B=2))


def test_prefix_matches_create_mask() -> None:
    lengths = torch.tensor([0, 5, 12])

    def mask_mod(b, h, q, kv):
        return (kv < lengths[b]) | (q >= kv)

    assert torch.equal(prefix_pattern(T, [0, 5, 12]), flex(mask_mod, B=3))  # reference: create_mask
    assert torch.equal(prefix_pattern(T, 5), flex(mask_mod, B=3)[1])


def test_combinations_match_create_mask() -> None:
    docs = torch.tensor([0, 0, 0, 0, 0, 1, 1, 1, 1, 1, 1, 1])

    def inter(b, h, q, kv):
        return (docs[q] == docs[kv]) & (q >= kv) & (q - kv < 3)

    def union(b, h, q, kv):
        return ((q >= kv) & (q - kv < 3)) | (kv < 2)

    assert torch.equal(all_of(documents_pattern(docs), window_pattern(T, 3)), flex(inter)[0])
    sink = torch.zeros(T, T, dtype=torch.bool)
    sink[:, :2] = True
    assert torch.equal(any_of(window_pattern(T, 3), sink), flex(union)[0])  # reference: create_mask


def test_hand_truth_tables() -> None:
    # written out by hand
    assert window_pattern(4, 2).int().tolist() == [[1, 0, 0, 0], [1, 1, 0, 0], [0, 1, 1, 0], [0, 0, 1, 1]]
    assert window_pattern(4, 2, layers=2).int().tolist() == [[1, 0, 0, 0], [1, 1, 0, 0], [1, 1, 1, 0],
                                                             [0, 1, 1, 1]]
    assert documents_pattern([0, 0, 1, 1]).int().tolist() == [[1, 0, 0, 0], [1, 1, 0, 0], [0, 0, 1, 0],
                                                              [0, 0, 1, 1]]
    assert prefix_pattern(4, 3).int().tolist() == [[1, 1, 1, 0], [1, 1, 1, 0], [1, 1, 1, 0], [1, 1, 1, 1]]
    assert causal_pattern(2).int().tolist() == [[1, 0], [1, 1]]


def test_predicates_scalar_and_broadcast_forms_agree_with_create_mask() -> None:
    docs = torch.tensor([0, 0, 1, 1, 1, 2, 2, 2, 2, 3, 3, 3])

    def mask_mod(b, h, q, kv):
        return (docs[q] == docs[kv]) & (q >= kv)

    def scalar_only(b, h, q, kv):  # torch.where on scalars works under vmap only: exercises the fallback
        return torch.where(q >= kv, docs[q] == docs[kv], torch.zeros((), dtype=torch.bool)).reshape(())

    ref = flex(mask_mod, B=2)  # reference: create_mask
    assert torch.equal(pattern_from_predicate(mask_mod, T, B=2), ref)
    assert torch.equal(pattern_from_predicate(scalar_only, T, B=2), ref)
    assert torch.equal(as_pattern(mask_mod, T, 2), ref)


def test_bad_patterns_fail_at_the_door() -> None:
    with pytest.raises(OptionError, match="window"):
        window_pattern(5, 0)
    with pytest.raises(OptionError, match="prefix"):
        prefix_pattern(5, 6)
    with pytest.raises(ShapeError, match="document ids"):
        documents_pattern(torch.zeros(2, 2, 2, dtype=torch.long))
    with pytest.raises(ShapeError, match=r"\(T, T\) = \(4, 4\)"):
        as_pattern(causal_pattern(5), T=4, B=1)
    with pytest.raises(ShapeError, match="bool"):
        as_pattern(torch.ones(4, 4), T=4, B=1)
    with pytest.raises(ShapeError, match="same number of positions"):
        all_of(causal_pattern(3), causal_pattern(4))
