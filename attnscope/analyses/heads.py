"""Which heads do nothing, and which copy each other.

* :func:`dead_heads` flags heads, each with its reason: **uniform** (near-uniform attention, mean
  ``entropy_ratio`` close to 1), **sink** (nearly all weight on the first allowed key or on one fixed key),
  **silent** (the head's weighted values through the output projection, ``‖Σ_k α_k v_k W_O‖``, are near zero
  beside the other heads of the module: the norm-based analysis of G. Kobayashi, T. Kuribayashi, S. Yokoi and
  K. Inui, "Attention is Not Only a Weight", EMNLP 2020, measured by :func:`head_output_norms`), and
  optionally **insensitive** (ablating it hardly changes the loss, from
  :func:`~attnscope.analyses.ablation.head_importance`).
* :func:`duplicate_heads` reports pairs of heads whose maps over the same inputs are closer than a threshold
  in Jensen–Shannon distance (:func:`~attnscope.analyses.similarity.head_distances`); K. Clark, U. Khandelwal,
  O. Levy and C. D. Manning, "What Does BERT Look At?", BlackboxNLP 2019, compare and cluster heads this way.
* :func:`head_clusters` clusters the heads hierarchically on the same distances (``scipy.cluster.hierarchy``)
  and returns plain data a view can draw.

Heads are identified by ``(module name, head)``; statistics of several calls of one module (several
forwards, several batches) are pooled. Distances pair the k-th call of one module with the k-th call of the
other, so each comparison is over the same inputs.

>>> import torch, attnscope
>>> mha = torch.nn.MultiheadAttention(8, 2, batch_first=True)
>>> with torch.no_grad():
...     mha.in_proj_weight[:8] = 0.0          # every query 0: every score 0, uniform weights in both heads
>>> x = torch.randn(2, 5, 8)
>>> with attnscope.capture(mha) as cap:
...     _ = mha(x, x, x)
>>> [f.kind for f in dead_heads(cap)]
['uniform', 'uniform']
>>> [(p.head_a, p.head_b) for p in duplicate_heads(cap)]
[(0, 1)]
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any, NamedTuple

import numpy as np
import pandas as pd
import torch
from torch import nn

from attnscope.analyses.ablation import AttentionCall, observe_heads
from attnscope.analyses.similarity import _exact_matrix, distance_bounds, head_distances
from attnscope.capture import record_sums
from attnscope.errors import OptionError, ShapeError, UnsupportedModelError, suggest
from attnscope.names import name_matches
from attnscope.records import AttentionRecord, HeadSums

__all__ = [
    "OUT_PROJ_NAMES",
    "HeadClusters",
    "HeadFinding",
    "HeadPair",
    "dead_heads",
    "duplicate_heads",
    "head_clusters",
    "head_output_norms",
]

#: Names the output projection of an attention module goes by, looked for in the module, then its parent.
OUT_PROJ_NAMES = ("o_proj", "out_proj", "c_proj", "dense", "o", "proj", "out", "to_out")

LINKAGE_METHODS = ("average", "complete", "single", "weighted")


class HeadFinding(NamedTuple):
    """A head flagged by :func:`dead_heads`; ``reason`` starts with its kind (``"uniform: ..."``)."""

    name: str
    head: int
    reason: str

    @property
    def kind(self) -> str:
        """``"uniform"``, ``"sink"``, ``"silent"`` or ``"insensitive"``."""
        return self.reason.split(":", 1)[0]


class HeadPair(NamedTuple):
    """Two heads whose maps are alike (:func:`duplicate_heads`): Jensen–Shannon distance in [0, 1]."""

    name_a: str
    head_a: int
    name_b: str
    head_b: int
    distance: float


def _records(cap: Any) -> list[AttentionRecord]:
    return list(cap.attention if hasattr(cap, "attention") else cap)


# -------------------------------------------------------------------- pooled statistics per (name, head)
@dataclass
class _Pool:
    """Per-head sums of one module over all its calls."""

    heads: tuple[int, ...]
    sums: HeadSums
    rows2: np.ndarray | None = None  # (H,) rows with two or more allowed keys (maps only)
    first: np.ndarray | None = None  # (H,) weight on the first allowed key over those rows
    fixed: np.ndarray | None = None  # (H, Tk) weight on each key over those rows


def _pool(records: Sequence[AttentionRecord]) -> dict[str, _Pool]:
    pools: dict[str, _Pool] = {}
    for rec in records:
        sums = record_sums(rec)
        pool = pools.get(rec.name)
        if pool is None:
            pool = pools[rec.name] = _Pool(rec.heads, HeadSums.zeros(len(rec.heads)))
        elif pool.heads != rec.heads:
            raise ShapeError(f"records of '{rec.name}' kept different heads: {pool.heads} and {rec.heads}")
        pool.sums = pool.sums.merge(sums)
        if rec.weights is None:
            continue
        w = rec.weights  # (B, H, Tq, Tk) float32, read in place
        total = w.sum(axis=-1)  # (B, H, Tq): finite exactly when every weight of the row is
        finite = np.isfinite(total)
        if not finite.all():
            w = np.nan_to_num(w, nan=0.0, posinf=0.0, neginf=0.0)  # rare: a copy only for broken maps
        b, h, tq, tk = w.shape
        allowed = np.ones((1, 1, tq, tk), bool) if rec.allowed is None else rec.allowed  # broadcastable
        rows = (allowed.sum(axis=-1) >= 2) & finite  # (B, H, Tq)
        first_key = np.broadcast_to(allowed.argmax(axis=-1)[..., None], (b, h, tq, 1))  # (B, H, Tq, 1)
        first = (np.take_along_axis(w, first_key, axis=-1)[..., 0] * rows).sum(axis=(0, 2), dtype=np.float64)
        if rows.all():  # every row counted (the usual case): a plain single-threaded sum, no BLAS call
            fixed = w.sum(axis=2).sum(axis=0, dtype=np.float64)  # (H, Tk)
        else:
            fixed = np.einsum("bhqk,bhq->hk", w, rows.astype(np.float32), optimize=True).astype(np.float64)  # (H, Tk)
        if pool.fixed is None:
            pool.rows2, pool.first, pool.fixed = np.zeros(len(rec.heads)), np.zeros(len(rec.heads)), fixed
        else:
            tk = max(pool.fixed.shape[1], fixed.shape[1])
            pool.fixed = _pad(pool.fixed, tk) + _pad(fixed, tk)
        pool.rows2 = pool.rows2 + rows.sum(axis=(0, 2))
        pool.first = pool.first + first
    return pools


def _pad(a: np.ndarray, width: int) -> np.ndarray:
    return np.pad(a, ((0, 0), (0, width - a.shape[1])))


def _sink_share(pool: _Pool, i: int) -> tuple[float, str]:
    """Largest share of a head's weight on one key, and where: maps if kept, else the stats' first key."""
    if pool.fixed is not None and pool.rows2[i] > 0:
        first = pool.first[i] / pool.rows2[i]
        fixed = pool.fixed[i] / pool.rows2[i]
        k = int(fixed.argmax())
        if fixed[k] > first:
            return float(fixed[k]), f"key {k}"
        return float(first), "the first allowed key"
    share = pool.sums.means()["sink_mass"][i]
    return float(share), "the first allowed key"


# -------------------------------------------------------------------- output norms (Kobayashi et al. 2020)
def _is_projection(module: nn.Module) -> bool:
    weight = getattr(module, "weight", None)
    return isinstance(weight, torch.Tensor) and weight.dim() == 2 and (
        isinstance(module, nn.Linear) or type(module).__name__ == "Conv1D")


def _find_projection(model: nn.Module, name: str, chosen: Sequence[tuple[str, str]]) -> tuple[str, nn.Module]:
    for pattern, target in chosen:
        if name_matches(name, pattern):
            return target, model.get_submodule(target)
    places = [name] if name == "" else [name, name.rsplit(".", 1)[0] if "." in name else ""]
    for place in places:
        owner = model.get_submodule(place)
        for sub, module in owner.named_modules():
            if sub and sub.rsplit(".", 1)[-1] in OUT_PROJ_NAMES and _is_projection(module):
                return (f"{place}.{sub}" if place else sub), module
    raise UnsupportedModelError(
        f"head_output_norms: found no output projection for '{name}' (a Linear named one of "
        f"{', '.join(OUT_PROJ_NAMES)} in it or its parent); name it with out_proj={{'{name}': 'path.to.linear'}}")


def _head_weights(module: nn.Module, heads: int, dh: int, owner: str, where: str) -> torch.Tensor:
    """``(H, Dh, D)`` slices of an output projection, one per head (nn.Linear or the transposed HF Conv1D)."""
    w = module.weight.detach().float()
    w = w if type(module).__name__ == "Conv1D" else w.T  # (H·Dh, D): Conv1D keeps (in, out), Linear (out, in)
    if w.shape[0] != heads * dh:
        raise ShapeError(f"head_output_norms: '{owner}' has {heads} heads of width {dh} ({heads * dh} inputs to "
                         f"its output projection), but '{where}' takes {w.shape[0]} inputs")
    return w.reshape(heads, dh, w.shape[1])


def head_output_norms(model: nn.Module, *args: Any, out_proj: Mapping[str, str] | None = None,
                      **kwargs: Any) -> pd.DataFrame:
    """Norm of each head's contribution to its module's output, ``‖Σ_k α_k v_k W_O‖`` (Kobayashi et al. 2020).

    >>> import torch
    >>> layer = torch.nn.TransformerEncoderLayer(16, 2, 32, batch_first=True)
    >>> with torch.no_grad():
    ...     layer.self_attn.out_proj.weight[:, 8:] = 0.0      # head 1 writes nothing
    >>> norms = head_output_norms(layer, torch.randn(2, 5, 16))
    >>> norms["relative"].round(3).tolist()
    [2.0, 0.0]

    Runs ``model(*args, **kwargs)`` once in eval mode without gradients (the mode is restored) and sees, at
    each attention call, the head outputs ``α·v`` ``(B, H, Tq, Dh)``. Each head's slice of the output
    projection maps them to the model width; the bias, shared by all heads, is left out. The projection is
    ``out_proj_weight`` of ``nn.MultiheadAttention``; for other modules a ``nn.Linear`` (or HF ``Conv1D``) named
    one of :data:`OUT_PROJ_NAMES` inside the attention module, else inside its parent (HF BERT keeps it there),
    or the one *out_proj* names: ``{"attention module name or pattern": "dotted name of the projection"}``.
    The heads must enter the projection side by side (head ``h`` in inputs ``h·Dh : (h+1)·Dh``), as usual.

    Returns:
        DataFrame, one row per (attention call, head): ``name``, ``call`` (0, 1, ... in call order), ``head``,
        ``norm`` (mean over batch and query rows) and ``relative`` (``norm`` over the mean norm of the
        call's heads; 1 for an average head, 0 for one that writes nothing).
    """
    chosen: list[tuple[str, str]] = []
    names = [n for n, _ in model.named_modules()]
    for pattern, target in (out_proj or {}).items():
        if target not in names:
            raise OptionError(f"out_proj= names '{target}', which is no module of {type(model).__name__}."
                              f"{suggest(target, names)}")
        if not _is_projection(model.get_submodule(target)):
            raise OptionError(f"out_proj= names '{target}', a {type(model.get_submodule(target)).__name__}; "
                              "expected an nn.Linear")
        chosen.append((pattern, target))
    rows: list[dict[str, Any]] = []

    def observe(call: AttentionCall, per_head: torch.Tensor) -> None:
        b, h, tq, dh = per_head.shape
        if call.out_weight is not None:
            w = call.out_weight.float().T.reshape(h, dh, -1)  # (H, Dh, D)
        else:
            where, proj = _find_projection(model, call.name, chosen)
            w = _head_weights(proj, h, dh, call.name, where)
        contrib = torch.einsum("bhqd,hde->bhqe", per_head.float(), w)  # (B, H, Tq, D): each head through W_O
        norm = torch.linalg.vector_norm(contrib, dim=-1).double().mean(dim=(0, 2))  # (H,)
        mean = float(norm.mean())
        for j in range(h):
            rows.append({"name": call.name, "call": call.index, "head": j, "norm": float(norm[j]),
                         "relative": float(norm[j]) / mean if mean > 0 else 0.0})

    observe_heads(model, observe, lambda: model(*args, **kwargs))
    return pd.DataFrame(rows, columns=["name", "call", "head", "norm", "relative"])


# -------------------------------------------------------------------- dead heads
_KINDS = ("uniform", "sink", "silent", "insensitive")


def dead_heads(cap: Any, *, uniform_at: float = 0.99, sink_at: float = 0.9,
               output_norms: pd.DataFrame | None = None, silent_at: float = 0.05,
               importance: pd.DataFrame | None = None, insensitive_at: float = 0.01) -> list[HeadFinding]:
    """Heads that do nothing useful, each with the reason it was flagged (one finding per reason).

    >>> import torch, attnscope
    >>> layer = torch.nn.TransformerEncoderLayer(16, 2, 32, batch_first=True).eval()
    >>> with torch.no_grad():
    ...     layer.self_attn.out_proj.weight[:, :8] = 0.0      # head 0 writes nothing
    >>> x = torch.randn(2, 6, 16)
    >>> with attnscope.capture(layer) as cap:
    ...     _ = layer(x)
    >>> dead_heads(cap, output_norms=head_output_norms(layer, x))[0].reason
    'silent: output norm 0.000 of the mean head of self_attn (below 0.05)'

    Args:
        cap: a capture or a list of :class:`~attnscope.records.AttentionRecord` (maps or statistics).
        uniform_at: flag **uniform** when the mean ``entropy_ratio`` (entropy over ``ln`` of the number of
            allowed keys; 1 for uniform weights) is at least this. Default 0.99; random heads at initialisation
            score about 0.93–0.96, zeroed queries score 1.
        sink_at: flag **sink** when at least this share of the weight lands on one key: the first allowed key,
            or one fixed key position (needs maps). Counted over rows with two or more allowed keys (rows with a
            single choice say nothing); with statistics only, the head table's ``sink_mass``. Default 0.9.
        output_norms: the table of :func:`head_output_norms`; enables **silent**.
        silent_at: flag **silent** when a head's mean output norm is below this fraction of the mean over the
            heads of its module. Default 0.05.
        importance: the table of :func:`~attnscope.analyses.ablation.head_importance`; enables **insensitive**.
        insensitive_at: flag **insensitive** when a head's ``importance`` is at most this fraction of the
            largest importance of all heads in the table. Default 0.01.

    Returns:
        A list of :class:`HeadFinding` ``(name, head, reason)``, ordered by module (first seen first), head,
        then kind (uniform, sink, silent, insensitive).
    """
    for label, value in (("uniform_at", uniform_at), ("sink_at", sink_at), ("silent_at", silent_at),
                         ("insensitive_at", insensitive_at)):
        if not isinstance(value, (int, float)) or not 0 <= value <= 1:
            raise OptionError(f"{label} must be a number in [0, 1]; received {value!r}")
    found: dict[tuple[str, int], list[str]] = {}
    order: list[str] = []

    def flag(name: str, head: int, kind: str, text: str) -> None:
        if name not in order:
            order.append(name)
        found.setdefault((name, head), []).append(f"{kind}: {text}")

    for name, pool in _pool(_records(cap)).items():
        if name not in order:
            order.append(name)
        ratio = pool.sums.means()["entropy_ratio"]
        for i, head in enumerate(pool.heads):
            if np.isfinite(ratio[i]) and ratio[i] >= uniform_at:
                flag(name, head, "uniform", f"entropy_ratio {ratio[i]:.3f} (at least {uniform_at:g})")
            share, where = _sink_share(pool, i)
            if np.isfinite(share) and share >= sink_at:
                flag(name, head, "sink", f"{share:.3f} of the weight on {where} (at least {sink_at:g})")
    if output_norms is not None:
        _need_columns(output_norms, ("name", "head", "norm"), "output_norms", "head_output_norms(model, ...)")
        per_head = output_norms.groupby(["name", "head"], sort=False)["norm"].mean()
        for name, norms in per_head.groupby(level="name", sort=False):
            mean = float(norms.mean())
            for (_, head), norm in norms.items():
                rel = norm / mean if mean > 0 else 0.0
                if rel < silent_at:
                    flag(name, int(head), "silent",
                         f"output norm {rel:.3f} of the mean head of {name or 'the model'} (below {silent_at:g})")
    if importance is not None:
        _need_columns(importance, ("name", "head", "importance"), "importance", "head_importance(model, fn)")
        top = float(importance["importance"].abs().max()) if len(importance) else 0.0
        for name, head, value in importance[["name", "head", "importance"]].itertuples(index=False):
            if abs(value) <= insensitive_at * top or top == 0.0:
                flag(name, int(head), "insensitive",
                     f"ablating it changes the measure by {value:.3g}, at most {insensitive_at:g} of the largest "
                     f"({top:.3g})")
    rank = {n: i for i, n in enumerate(order)}
    out = [HeadFinding(name, head, reason) for (name, head), reasons in found.items() for reason in reasons]
    out.sort(key=lambda f: (rank[f.name], f.head, _KINDS.index(f.kind)))
    return out


def _need_columns(frame: Any, columns: Sequence[str], what: str, source: str) -> None:
    if not isinstance(frame, pd.DataFrame) or any(c not in frame.columns for c in columns):
        got = list(frame.columns) if isinstance(frame, pd.DataFrame) else type(frame).__name__
        raise OptionError(f"{what}= expects the DataFrame of {source} with columns {list(columns)}; received {got}")


# -------------------------------------------------------------------- distances per (name, head)
def _columns(cap: Any, item: int | None) -> tuple[list[AttentionRecord], list[tuple[str, int]], np.ndarray,
                                                  np.ndarray]:
    """Records with maps, labels ``(name, head)``, and per column of the full matrix its label and call number."""
    records = [r for r in _records(cap) if r.weights is not None]
    if not records:
        raise ShapeError("head distances need attention maps; this capture kept statistics only "
                         "(capture with keep='maps')")
    if item is not None:
        batch = min(r.batch for r in records)
        if not isinstance(item, int) or not 0 <= item < batch:
            raise OptionError(f"item must be a batch index in 0..{batch - 1}; received {item!r}")
    seen: dict[str, int] = {}
    keys: dict[tuple[str, int], int] = {}
    col_key, col_occ = [], []
    for rec in records:
        occ = seen.get(rec.name, 0)
        seen[rec.name] = occ + 1
        for h in rec.heads:
            col_key.append(keys.setdefault((rec.name, h), len(keys)))
            col_occ.append(occ)
    return records, list(keys), np.array(col_key), np.array(col_occ)


def _pool_columns(dist: np.ndarray, key: np.ndarray, occ: np.ndarray, n: int) -> np.ndarray:
    """Mean over matching calls (the k-th call of both modules) of a ``(columns, columns)`` matrix."""
    valid = (occ[:, None] == occ[None, :]) & np.isfinite(dist)
    total, count = np.zeros((n, n)), np.zeros((n, n))
    rows, cols = np.nonzero(valid)
    np.add.at(total, (key[rows], key[cols]), dist[rows, cols])
    np.add.at(count, (key[rows], key[cols]), 1.0)
    with np.errstate(invalid="ignore"):
        mean = total / count
    np.fill_diagonal(mean, 0.0)
    return mean


def _head_matrix(cap: Any, item: int | None, exact: bool = True) -> tuple[list[tuple[str, int]], np.ndarray]:
    """Labels ``(name, head)`` of heads with maps and their mean distance over matching calls."""
    records, labels, key, occ = _columns(cap, item)
    dist = head_distances(records, item=item, exact=exact).to_numpy()  # (N, N) over (call, name, head) columns
    return labels, _pool_columns(dist, key, occ, len(labels))


def duplicate_heads(cap: Any, *, max_distance: float = 0.1, item: int | None = None) -> list[HeadPair]:
    """Pairs of heads whose maps over the same inputs are closer than *max_distance* (Jensen–Shannon).

    >>> import torch, attnscope
    >>> mha = torch.nn.MultiheadAttention(8, 2, batch_first=True)
    >>> with torch.no_grad():                    # head 1 gets head 0's query and key weights
    ...     mha.in_proj_weight[4:8] = mha.in_proj_weight[0:4]
    ...     mha.in_proj_weight[12:16] = mha.in_proj_weight[8:12]
    ...     mha.in_proj_bias[4:8] = mha.in_proj_bias[0:4]
    ...     mha.in_proj_bias[12:16] = mha.in_proj_bias[8:12]
    >>> x = torch.randn(1, 6, 8)
    >>> with attnscope.capture(mha) as cap:
    ...     _ = mha(x, x, x)
    >>> pair = duplicate_heads(cap)[0]
    >>> (pair.head_a, pair.head_b, pair.distance < 0.01)
    (0, 1, True)

    Args:
        cap: a capture (or list of records) that kept maps.
        max_distance: report pairs at most this far apart. The distance is the Jensen–Shannon distance
            (base 2, in [0, 1]) of the two heads' weight rows for the same (batch item, query), averaged over
            rows and over matching calls (the k-th call of one module with the k-th of the other). Default 0.1;
            random heads at initialisation lie about 0.2–0.3 apart, copies about 0.
        item: compare on one batch item only (default: all).

    Returns:
        A list of :class:`HeadPair` ``(name_a, head_a, name_b, head_b, distance)``, closest first; ``a`` is the
        head seen first. Pairs of heads whose maps never share a shape are not compared.

    Exact: the distances are those of scipy's ``jensenshannon`` (float64). A pair is ruled out without computing
    it only when its lower bound (the mean Hellinger distance, :func:`~attnscope.analyses.similarity.distance_bounds`,
    one float32 matrix product per query row, rounded down past float32 error) is above *max_distance*; the
    pairs left are computed exactly, a few rows at a time so memory stays bounded.
    """
    if not isinstance(max_distance, (int, float)) or not 0 <= max_distance <= 1:
        raise OptionError(f"max_distance must be a number in [0, 1]; received {max_distance!r}")
    records, labels, key, occ = _columns(cap, item)
    low = _pool_columns(distance_bounds(records, item)[0].to_numpy(), key, occ, len(labels))  # (n, n)
    near = low <= max_distance + 1e-9  # the bound is rounded down already; 1e-9 covers the pooling sums
    below = near[key[:, None], key[None, :]] & (occ[:, None] == occ[None, :])  # (N, N) columns to compute
    mean = _pool_columns(_exact_matrix(records, item, below)[1], key, occ, len(labels))
    pairs = [HeadPair(labels[a][0], labels[a][1], labels[b][0], labels[b][1], float(mean[a, b]))
             for a in range(len(labels)) for b in range(a + 1, len(labels))
             if np.isfinite(mean[a, b]) and mean[a, b] <= max_distance]
    pairs.sort(key=lambda p: p.distance)
    return pairs


# -------------------------------------------------------------------- clustering
@dataclass(frozen=True, repr=False)
class HeadClusters:
    """A hierarchical clustering of heads on their map distances (:func:`head_clusters`).

    Fields:
        labels: ``(module name, head)`` of each clustered head, in capture order.
        distances: float64 ``(n, n)`` distances used; pairs never compared are set to 1, the largest
            Jensen–Shannon distance.
        linkage: float64 ``(n - 1, 4)`` merge table in ``scipy.cluster.hierarchy.linkage`` form: the two
            clusters merged (indices ``>= n`` are earlier merges), their distance, the new cluster's size.
        order: leaf order that draws the tree without crossings (indices into ``labels``).
        method: the linkage method.
    """

    labels: list[tuple[str, int]]
    distances: np.ndarray
    linkage: np.ndarray
    order: list[int]
    method: str

    def groups(self, max_distance: float = 0.1) -> list[list[tuple[str, int]]]:
        """Flat clusters: heads joined below *max_distance*, groups of two or more, in leaf order."""
        from scipy.cluster.hierarchy import fcluster

        ids = fcluster(self.linkage, t=max_distance, criterion="distance")
        out: dict[int, list[tuple[str, int]]] = {}
        for i in self.order:
            out.setdefault(int(ids[i]), []).append(self.labels[i])
        return [g for g in out.values() if len(g) > 1]

    def tree(self) -> dict[str, list]:
        """Line segments of the dendrogram, for drawing: ``x``/``y`` lists of 4 points per merge, and the leaves.

        Leaf ``i`` (in :attr:`order`) sits at ``x = 10·i + 5``, merges at their distance on ``y``
        (``scipy.cluster.hierarchy.dendrogram`` coordinates).
        """
        from scipy.cluster.hierarchy import dendrogram

        d = dendrogram(self.linkage, no_plot=True)
        return {"x": [list(map(float, s)) for s in d["icoord"]], "y": [list(map(float, s)) for s in d["dcoord"]],
                "leaves": [self.labels[i] for i in d["leaves"]]}

    def __repr__(self) -> str:
        return f"HeadClusters(heads={len(self.labels)}, method={self.method!r})"


def head_clusters(cap: Any, *, method: str = "average", item: int | None = None,
                  exact: bool = False) -> HeadClusters:
    """Cluster heads hierarchically on the Jensen–Shannon distance of their maps (Clark et al. 2019).

    >>> import torch, attnscope
    >>> mha = torch.nn.MultiheadAttention(8, 4, batch_first=True)
    >>> x = torch.randn(1, 6, 8)
    >>> with attnscope.capture(mha) as cap:
    ...     _ = mha(x, x, x)
    >>> tree = head_clusters(cap)
    >>> tree.linkage.shape, len(tree.tree()["x"])
    ((3, 4), 3)

    Args:
        cap: a capture (or list of records) that kept maps.
        method: ``scipy.cluster.hierarchy.linkage`` method: ``"average"`` (default), ``"complete"``,
            ``"single"`` or ``"weighted"`` (methods that need Euclidean points are not offered).
        item: use one batch item only.
        exact: cluster on exact distances; by default on the estimate of
            :func:`~attnscope.analyses.similarity.head_distances` (exact up to 64 rows per map, else within
            0.035 of it with 95 % probability per pair), which keeps 144 heads at T=1024 to seconds.

    Returns:
        A :class:`HeadClusters`.
    """
    from scipy.cluster.hierarchy import leaves_list, linkage
    from scipy.spatial.distance import squareform

    if method not in LINKAGE_METHODS:
        raise OptionError(f"method must be one of {', '.join(LINKAGE_METHODS)}; received {method!r}."
                          f"{suggest(str(method), LINKAGE_METHODS)}")
    labels, mean = _head_matrix(cap, item, exact=exact)
    if len(labels) < 2:
        raise ShapeError(f"clustering needs two or more heads with maps; the capture has {len(labels)}")
    dist = np.where(np.isfinite(mean), mean, 1.0)
    dist = 0.5 * (dist + dist.T)
    np.fill_diagonal(dist, 0.0)
    z = linkage(squareform(dist, checks=False), method=method)
    return HeadClusters(labels=labels, distances=dist, linkage=z, order=[int(i) for i in leaves_list(z)],
                        method=method)

