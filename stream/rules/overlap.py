"""Which regions of one rule set meet which regions of another, without comparing every
pair.

The numeric bounds of the second set's regions go into a bounding-box hierarchy
(boxes split at the median centre of their widest feature, eight regions per leaf); a
compiled walk keeps only the boxes a query region meets, so the cost follows the regions
met and the depth, not the product of the set sizes. Category conditions are not in the
boxes: every pair the walk finds is checked exactly with
:func:`stream.rules.regions.overlaps` (records with every value present).
"""

from __future__ import annotations

from typing import Sequence

import numpy as np

from stream.jit import njit

from .regions import Span, overlaps

_LEAF_SIZE = 8


def meeting_lists(queries: Sequence[dict[str, Span]],
                  regions: Sequence[dict[str, Span]]) -> list[list[int]]:
    """For each query region, the indices (ascending) of ``regions`` that some record
    with every value present satisfies together with it."""
    if not queries or not regions:
        return [[] for _ in queries]
    columns = sorted({f for region in (*queries, *regions) for f, span in region.items()
                      if span.kind == "num"})
    index = {f: k for k, f in enumerate(columns)}
    qlo, qhi = _boxes(queries, index)
    rlo, rhi = _boxes(regions, index)
    tree = _Hierarchy(rlo, rhi)
    counts = np.zeros(len(queries), np.int64)
    _walk(qlo, qhi, tree.lo, tree.hi, tree.left, tree.right, tree.start, tree.stop,
          tree.order, rlo, rhi, counts, counts, np.zeros(0, np.int64), False)
    starts = np.zeros(len(queries) + 1, np.int64)
    np.cumsum(counts, out=starts[1:])
    found = np.empty(int(starts[-1]), np.int64)
    _walk(qlo, qhi, tree.lo, tree.hi, tree.left, tree.right, tree.start, tree.stop,
          tree.order, rlo, rhi, counts, starts, found, True)
    out = []
    for q, query in enumerate(queries):
        candidates = np.sort(found[starts[q]:starts[q + 1]]).tolist()
        out.append([j for j in candidates if overlaps(query, regions[j], False)])
    return out


def _boxes(regions: Sequence[dict[str, Span]], index: dict[str, int]):
    lo = np.full((len(regions), max(len(index), 1)), -np.inf)
    hi = np.full((len(regions), max(len(index), 1)), np.inf)
    for r, region in enumerate(regions):
        for feature, span in region.items():
            if span.kind == "num":
                k = index[feature]
                if span.lo is not None:
                    lo[r, k] = span.lo
                if span.hi is not None:
                    hi[r, k] = span.hi
    return lo, hi


class _Hierarchy:
    """Bounding boxes over the rows of ``lo``/``hi``: node arrays and the row order."""

    def __init__(self, lo: np.ndarray, hi: np.ndarray) -> None:
        finite = np.concatenate([lo[np.isfinite(lo)], hi[np.isfinite(hi)]])
        low, high = (finite.min(), finite.max()) if finite.size else (0.0, 0.0)
        self._centre = (np.clip(lo, low, high) + np.clip(hi, low, high)) / 2.0
        self._lo_rows, self._hi_rows = lo, hi
        self.order = np.arange(lo.shape[0], dtype=np.int64)
        boxes_lo, boxes_hi, left, right, start, stop = [], [], [], [], [], []

        def build(first: int, last: int) -> int:
            node = len(left)
            rows = self.order[first:last]
            boxes_lo.append(lo[rows].min(axis=0))
            boxes_hi.append(hi[rows].max(axis=0))
            left.append(-1)
            right.append(-1)
            start.append(first)
            stop.append(last)
            if last - first > _LEAF_SIZE:
                centres = self._centre[rows]
                feature = int(np.argmax(centres.max(axis=0) - centres.min(axis=0)))
                ranked = rows[np.argsort(centres[:, feature], kind="stable")]
                self.order[first:last] = ranked
                middle = (first + last) // 2
                left[node] = build(first, middle)
                right[node] = build(middle, last)
            return node

        build(0, lo.shape[0])
        self.lo, self.hi = np.array(boxes_lo), np.array(boxes_hi)
        self.left, self.right = np.array(left, np.int64), np.array(right, np.int64)
        self.start, self.stop = np.array(start, np.int64), np.array(stop, np.int64)


@njit
def _boxes_meet(alo, ahi, blo, bhi) -> bool:
    for f in range(alo.shape[0]):
        if max(alo[f], blo[f]) >= min(ahi[f], bhi[f]):
            return False
    return True


@njit
def _walk(qlo, qhi, nlo, nhi, left, right, start, stop, order, rlo, rhi, counts, starts,
          found, fill) -> None:
    """Count (``fill`` False) or list (``fill`` True, from ``starts[q]``) the rows whose
    boxes meet each query box."""
    stack = np.empty(left.shape[0] + 1, np.int64)
    for q in range(qlo.shape[0]):
        k = starts[q] if fill else 0
        top = 1
        stack[0] = 0
        while top > 0:
            top -= 1
            n = stack[top]
            if not _boxes_meet(qlo[q], qhi[q], nlo[n], nhi[n]):
                continue
            if left[n] < 0:
                for p in range(start[n], stop[n]):
                    r = order[p]
                    if _boxes_meet(qlo[q], qhi[q], rlo[r], rhi[r]):
                        if fill:
                            found[k] = r
                        k += 1
            else:
                stack[top] = left[n]
                stack[top + 1] = right[n]
                top += 2
        if not fill:
            counts[q] = k
