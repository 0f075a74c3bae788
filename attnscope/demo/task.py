"""The demo task: warehouse bin labels rewritten into pick-path order, with a known alignment.

A bin label names a row, a shelf and a bin, written row first: ``"R3 S12 B7"``. Pickers walk bin, shelf,
row, so the pick list wants ``"B7-S12-R3"``. The rewrite is a block permutation of the label's fields, which
makes the right cross-attention known in advance: every output token is tied to one source token.

>>> from attnscope.demo import task
>>> ex = task.make_examples(1, seed=0)[0]
>>> task.render(ex.source), task.render(ex.target)
('R63 S5 B61', 'B61-S5-R63')
>>> [ex.source[i] for i in ex.alignment]
['B', '6', '1', '<eos>', 'S', '5', '␣', 'R', '6', '3', '␣']

Tokens (one vocabulary for both sides, see :data:`VOCAB`)::

    <pad> <bos> <eos>          padding, start of the decoder input, end of a sequence
    R S B                      field letters: row, shelf, bin
    0 1 ... 9                  digits; a field's number has one or two of them
    ␣                          the space between the label's fields (source side)
    -                          the dash between the pick path's fields (target side)
    ;                          divides label from pick path in the one-sequence form (decoder-only models)

The alignment (``Example.alignment[t]`` is an index into ``Example.source``) says which source token
decides output token ``t``:

* a letter or digit reads its own copy in the label (``B`` reads ``B``, the ``6`` of ``B61`` reads that ``6``);
* a field's end (the ``-`` after a field, and ``<eos>`` after the last one) reads the source token right after
  that field's last digit: the ``␣`` that closes it in the label, or the label's ``<eos>`` for the bin field,
  which ends the label. That token is what tells a one- from a two-digit number.

Digits and field ends need the label; the letters come in the same places in every pick path, so a model
can write them without looking. Trained freely, heads follow the alignment on the digits and often not on
the letters; the seq2seq demo models therefore train one head to follow all of it (guided alignment).
"""

from __future__ import annotations

import random
import zlib
from collections.abc import Sequence
from dataclasses import dataclass

import torch

from attnscope.errors import OptionError, ShapeError, suggest

__all__ = [
    "BOS",
    "EOS",
    "Example",
    "FIELD_WIDTHS",
    "PAD",
    "SPLITS",
    "VOCAB",
    "Vocab",
    "build_example",
    "greedy_continue",
    "lm_batch",
    "lm_sequence",
    "make_examples",
    "pad_batch",
    "render",
    "seq2seq_batch",
    "split_of",
]

PAD, BOS, EOS = "<pad>", "<bos>", "<eos>"
LABEL_GAP, PATH_DASH, DIVIDER = "␣", "-", ";"

#: Each field's number has one or two digits (no leading zero), equally often, uniform within its width.
FIELD_WIDTHS = ((1, 9), (10, 99))

#: ``"train"`` and ``"held_out"`` are disjoint sets of labels (see :func:`split_of`).
SPLITS = ("train", "held_out")


@dataclass(frozen=True)
class Vocab:
    """Token strings and their ids; ids are positions in :attr:`tokens`.

    >>> VOCAB.decode(VOCAB.encode(["R", "3"]))
    ['R', '3']
    """

    tokens: tuple[str, ...]

    def __post_init__(self) -> None:
        if len(set(self.tokens)) != len(self.tokens):
            raise OptionError(f"vocabulary tokens must be unique; received {self.tokens!r}")

    def __len__(self) -> int:
        return len(self.tokens)

    @property
    def pad_id(self) -> int:
        return self.id(PAD)

    @property
    def bos_id(self) -> int:
        return self.id(BOS)

    @property
    def eos_id(self) -> int:
        return self.id(EOS)

    def id(self, token: str) -> int:
        """The id of one token string; unknown strings raise :class:`~attnscope.errors.OptionError`."""
        try:
            return self.tokens.index(token)
        except ValueError:
            raise OptionError(
                f"expected a token of the demo vocabulary; received {token!r}." + suggest(token, self.tokens)
            ) from None

    def encode(self, tokens: Sequence[str]) -> list[int]:
        """Token strings to ids."""
        return [self.id(t) for t in tokens]

    def decode(self, ids: Sequence[int] | torch.Tensor) -> list[str]:
        """Ids to token strings (what a view shows on its axes)."""
        values = ids.tolist() if isinstance(ids, torch.Tensor) else list(ids)
        for i in values:
            if not 0 <= int(i) < len(self.tokens):
                raise ShapeError(f"expected token ids in [0, {len(self.tokens)}); received {i}")
        return [self.tokens[int(i)] for i in values]

    def __repr__(self) -> str:
        return f"Vocab({len(self.tokens)} tokens)"


VOCAB = Vocab((PAD, BOS, EOS, "R", "S", "B", *"0123456789", LABEL_GAP, PATH_DASH, DIVIDER))


@dataclass(frozen=True)
class Example:
    """One label and its pick-path rewrite.

    Fields:
        label: ``(row, shelf, bin)`` numbers.
        source: label tokens ending in ``<eos>``: ``R 3 ␣ S 1 2 ␣ B 7 <eos>``.
        target: pick-path tokens ending in ``<eos>``: ``B 7 - S 1 2 - R 3 <eos>``.
        alignment: for each target token, the index of the source token that decides it (module docstring).
    """

    label: tuple[int, int, int]
    source: tuple[str, ...]
    target: tuple[str, ...]
    alignment: tuple[int, ...]


def split_of(label: tuple[int, int, int]) -> str:
    """Which split a label belongs to: a fixed hash sends about one label in eight to ``"held_out"``."""
    key = "{}-{}-{}".format(*label).encode()
    return "held_out" if zlib.crc32(key) % 8 == 0 else "train"


def build_example(label: tuple[int, int, int]) -> Example:
    """The example of one ``(row, shelf, bin)`` label, with its alignment."""
    source: list[str] = []
    spans: dict[str, tuple[int, int]] = {}  # letter -> (index of the letter, index just after the last digit)
    for letter, number in zip("RSB", label):
        if source:
            source.append(LABEL_GAP)
        start = len(source)
        source += [letter, *str(number)]
        spans[letter] = (start, len(source))
    source.append(EOS)

    target: list[str] = []
    alignment: list[int] = []
    for k, letter in enumerate("BSR"):
        start, end = spans[letter]
        target += source[start:end]
        alignment += range(start, end)  # letters and digits read their own copy
        target.append(PATH_DASH if k < 2 else EOS)
        alignment.append(end)  # a field's end reads the token that closes the field in the label
    return Example(tuple(label), tuple(source), tuple(target), tuple(alignment))


def make_examples(n: int, seed: int, split: str = "train") -> list[Example]:
    """*n* examples drawn with a seeded generator from one split.

    >>> [render(e.source) for e in make_examples(2, seed=1, split="held_out")]
    ['R6 S21 B94', 'R3 S57 B13']

    Args:
        n: number of examples.
        seed: seed of a private :class:`random.Random`; the same seed gives the same examples everywhere.
        split: ``"train"`` or ``"held_out"``; the two never share a label.

    Returns:
        A list of :class:`Example`.
    """
    if split not in SPLITS:
        raise OptionError(f"expected split one of {SPLITS}; received {split!r}." + suggest(split, SPLITS))
    rng = random.Random(seed)
    out: list[Example] = []
    while len(out) < n:
        label = tuple(rng.randint(*rng.choice(FIELD_WIDTHS)) for _ in range(3))
        if split_of(label) == split:
            out.append(build_example(label))
    return out


def render(tokens: Sequence[str]) -> str:
    """Token strings back to the text a person reads: ``R 3 ␣ S 1 2`` -> ``"R3 S12"``; specials dropped."""
    return "".join(" " if t == LABEL_GAP else t for t in tokens if t not in (PAD, BOS, EOS))


def pad_batch(seqs: Sequence[Sequence[int]], pad_id: int = VOCAB.pad_id) -> torch.Tensor:
    """Right-pad id lists to one ``(B, T)`` long tensor."""
    if not seqs:
        raise ShapeError("expected at least one sequence to pad; received none")
    width = max(len(s) for s in seqs)
    out = torch.full((len(seqs), width), pad_id, dtype=torch.long)  # (B, T)
    for i, s in enumerate(seqs):
        out[i, : len(s)] = torch.tensor(list(s), dtype=torch.long)
    return out


def seq2seq_batch(examples: Sequence[Example]) -> tuple[torch.Tensor, torch.Tensor, torch.Tensor]:
    """Encoder input, decoder input and decoder target of a batch, right-padded with ``<pad>``.

    Returns:
        ``(src, tgt_in, tgt_out)``: ``src`` (B, Ts) is the label with ``<eos>``; ``tgt_in`` (B, Tt) is
        ``<bos>`` plus the pick path without its ``<eos>``; ``tgt_out`` (B, Tt) is the pick path with ``<eos>``,
        so the decoder's query ``t`` predicts ``tgt_out[:, t]`` and is aligned to ``alignment[t]``.
    """
    src = pad_batch([VOCAB.encode(e.source) for e in examples])  # (B, Ts)
    tgt_in = pad_batch([VOCAB.encode((BOS, *e.target[:-1])) for e in examples])  # (B, Tt)
    tgt_out = pad_batch([VOCAB.encode(e.target) for e in examples])  # (B, Tt)
    return src, tgt_in, tgt_out


def lm_sequence(example: Example) -> tuple[str, ...]:
    """The one-sequence form for decoder-only models: ``<bos> R 3 ␣ S 1 2 ␣ B 7 ; B 7 - S 1 2 - R 3 <eos>``.

    The prompt is everything up to and including ``;``.
    """
    return (BOS, *example.source[:-1], DIVIDER, *example.target)


def lm_batch(examples: Sequence[Example]) -> tuple[torch.Tensor, torch.Tensor]:
    """Input ids and the prompt length of each row for decoder-only models.

    Returns:
        ``(ids, prompt_len)``: ``ids`` (B, T) right-padded one-sequence forms; ``prompt_len`` (B,) the number of
        tokens up to and including ``;`` in each row.
    """
    seqs = [lm_sequence(e) for e in examples]
    ids = pad_batch([VOCAB.encode(s) for s in seqs])  # (B, T)
    prompt_len = torch.tensor([s.index(DIVIDER) + 1 for s in seqs], dtype=torch.long)  # (B,)
    return ids, prompt_len


def greedy_continue(next_logits, start: torch.Tensor, steps: int, pad_id: int = VOCAB.pad_id,
                    eos_id: int = VOCAB.eos_id) -> torch.Tensor:
    """Greedy decoding shared by the demo models: extend ``start`` (B, T0) by up to *steps* argmax tokens.

    ``next_logits(ids)`` returns ``(B, T, V)`` logits for ids ``(B, T)``; a row that has produced ``<eos>``
    continues with ``<pad>``, and decoding stops once every row has. Returns ``(B, T0 + n)``.
    """
    out = start
    done = torch.zeros(start.shape[0], dtype=torch.bool, device=start.device)  # (B,)
    with torch.no_grad():
        for _ in range(steps):
            nxt = next_logits(out)[:, -1].argmax(-1)  # (B,)
            nxt = torch.where(done, torch.full_like(nxt, pad_id), nxt)
            out = torch.cat([out, nxt[:, None]], dim=1)  # (B, t + 1)
            done |= nxt == eos_id
            if bool(done.all()):
                break
    return out
