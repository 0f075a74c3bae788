"""What a capture keeps: frozen records of numpy arrays, never tensors of the model.

Shape vocabulary used across attnscope: ``B`` batch, ``H`` heads, ``Tq`` queries, ``Tk`` keys,
``T`` positions, ``D`` model width.

>>> import numpy as np
>>> from attnscope.records import HeadSums
>>> s = HeadSums.zeros(2)
>>> s.merge(s).rows.tolist()
[0.0, 0.0]
"""

from __future__ import annotations

from dataclasses import dataclass, fields

import numpy as np

__all__ = ["AttentionRecord", "HeadSums", "ResidualRecord", "STAT_COLUMNS"]

#: Per-head statistics in a head table, in order. Every one is a mean over the (batch, query) rows that have
#: at least one allowed key and only finite weights; ``entropy_ratio`` over rows with two or more allowed keys.
STAT_COLUMNS = ("entropy", "entropy_ratio", "max_weight", "sink_mass", "mean_distance", "leak_mass")


@dataclass(frozen=True, repr=False)
class HeadSums:
    """Mergeable per-head sums of attention statistics (sum-and-count form).

    Sums from different calls, batches or processes of the *same* heads add up with :meth:`merge`;
    :meth:`means` turns them into the head-table statistics. Every field is float64 of shape ``(H,)``.

    Fields:
        rows: number of (batch, query) rows counted (at least one allowed key, all weights finite).
        entropy: sum of row entropies ``-Σ_k w_k ln w_k`` in nats.
        ratio_rows: number of counted rows with two or more allowed keys.
        entropy_ratio: sum over those rows of ``entropy / ln(number of allowed keys)``.
        max_weight: sum of the row maxima.
        sink_mass: sum of the weight on each row's first allowed key.
        distance: sum of ``Σ_k w_k |i - k|`` with ``i`` the query's absolute position.
        leak_mass: sum of the weight on keys the applied mask forbids.
        nonfinite: number of rows left out because they held NaN or inf.
    """

    rows: np.ndarray
    entropy: np.ndarray
    ratio_rows: np.ndarray
    entropy_ratio: np.ndarray
    max_weight: np.ndarray
    sink_mass: np.ndarray
    distance: np.ndarray
    leak_mass: np.ndarray
    nonfinite: np.ndarray

    def take(self, heads: list[int]) -> HeadSums:
        """The sums of the chosen *heads* (positions along the head axis), in that order."""
        return HeadSums(**{f.name: getattr(self, f.name)[list(heads)] for f in fields(self)})

    @classmethod
    def zeros(cls, heads: int) -> HeadSums:
        """Empty sums for *heads* heads."""
        return cls(**{f.name: np.zeros(heads, dtype=np.float64) for f in fields(cls)})

    @property
    def heads(self) -> int:
        return int(self.rows.shape[0])

    def merge(self, other: HeadSums) -> HeadSums:
        """Add two sums of the same heads."""
        if other.heads != self.heads:
            from attnscope.errors import ShapeError

            raise ShapeError(f"cannot merge statistics of {self.heads} heads with statistics of {other.heads} heads")
        return HeadSums(**{f.name: getattr(self, f.name) + getattr(other, f.name) for f in fields(self)})

    @classmethod
    def concat(cls, parts: list[HeadSums]) -> HeadSums:
        """Sums of disjoint groups of heads, joined along the head axis in the given order."""
        return cls(**{f.name: np.concatenate([getattr(p, f.name) for p in parts]) for f in fields(cls)})

    def means(self) -> dict[str, np.ndarray]:
        """Per-head means, keyed by :data:`STAT_COLUMNS`; NaN where no row was counted."""
        with np.errstate(invalid="ignore", divide="ignore"):
            rows = np.where(self.rows > 0, self.rows, np.nan)
            ratio_rows = np.where(self.ratio_rows > 0, self.ratio_rows, np.nan)
            return {
                "entropy": self.entropy / rows,
                "entropy_ratio": self.entropy_ratio / ratio_rows,
                "max_weight": self.max_weight / rows,
                "sink_mass": self.sink_mass / rows,
                "mean_distance": self.distance / rows,
                "leak_mass": self.leak_mass / rows,
            }

    def as_arrays(self) -> dict[str, np.ndarray]:
        return {f.name: getattr(self, f.name) for f in fields(self)}

    def __repr__(self) -> str:
        return f"HeadSums(heads={self.heads}, rows={self.rows.sum():.0f})"


@dataclass(frozen=True, repr=False)
class AttentionRecord:
    """One attention call seen during a capture.

    Fields:
        name: dotted module path of the attention module in the captured model (``"decoder.layers.1.multihead_attn"``).
        kind: ``"self"`` or ``"cross"`` (keys and values come from another sequence than the queries).
        weights: float32 ``(B, H, Tq, Tk)`` attention weights of the kept heads, rows summing to 1 over allowed
            keys; ``None`` when the capture kept statistics only.
        allowed: bool, broadcastable to ``(B, H, Tq, Tk)``: True where the applied mask lets a query see a key
            (attention mask, key padding mask and causal flag combined); ``None`` when no mask was applied, and
            always ``None`` with ``keep="stats"`` (which keeps O(heads) numbers per call, no mask).
        causal: True when a causal mask was applied (``is_causal`` or a mask that forbids every later key).
        stats: per-head sums of the kept heads, computed from the full-precision weights during the call.
        shape: ``(B, H, Tq, Tk)`` of the call, before any head selection.
        heads: indices of the kept heads, in the order of ``weights``' head axis.
        call: position of this record in the capture's call order (0, 1, ...).
        source: how it was seen: ``"mha"`` (nn.MultiheadAttention), ``"sdpa"`` (scaled_dot_product_attention),
            ``"softmax"`` (a softmax inside an attention module), ``"tap"`` (the user's :func:`attnscope.tap`).
        query_offset: absolute position of query 0 counted on the key axis (``Tk - Tq`` for a self-attention
            step with a key/value cache, else 0).
        helper: dotted path of the module inside ``name`` that computed the weights (an ``Attend`` or
            ``ScaledDotProductAttention`` helper, an ``nn.Softmax`` child), or ``None`` when ``name`` did itself.
    """

    name: str
    kind: str
    weights: np.ndarray | None
    allowed: np.ndarray | None
    causal: bool
    stats: HeadSums
    shape: tuple[int, int, int, int]
    heads: tuple[int, ...]
    call: int = 0
    source: str = "sdpa"
    query_offset: int = 0
    helper: str | None = None

    @property
    def batch(self) -> int:
        return self.shape[0]

    @property
    def queries(self) -> int:
        return self.shape[2]

    @property
    def keys(self) -> int:
        return self.shape[3]

    def allowed_full(self) -> np.ndarray:
        """The allowed mask broadcast to the kept heads' ``(B, H, Tq, Tk)`` (all True when no mask was applied)."""
        b, _, tq, tk = self.shape
        h = len(self.heads)
        if self.allowed is None:
            return np.ones((b, h, tq, tk), dtype=bool)
        return np.broadcast_to(self.allowed, (b, h, tq, tk))

    def __repr__(self) -> str:
        w = "None" if self.weights is None else str(tuple(self.weights.shape))
        return (f"AttentionRecord(name={self.name!r}, kind={self.kind!r}, weights={w}, "
                f"causal={self.causal}, source={self.source!r})")


@dataclass(frozen=True, repr=False)
class ResidualRecord:
    """The residual stream leaving one transformer block.

    Fields:
        name: dotted module path of the block (``"encoder.layers.0"``).
        norms: float32 ``(B, T)``: L2 norm over the model width of the block's output at each position.
        call: position of this record in the capture's call order of blocks.
    """

    name: str
    norms: np.ndarray
    call: int = 0

    def __repr__(self) -> str:
        return f"ResidualRecord(name={self.name!r}, norms={tuple(self.norms.shape)})"
