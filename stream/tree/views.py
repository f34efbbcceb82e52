"""Read-only views of a tree's main part, shared by the classifier and the regressor.

Both learners keep their nodes in tables with the node layout of
:mod:`stream.tree.layout`; :class:`MainTreeViews` reads them. A subclass holds ``tables_``.
"""

from __future__ import annotations

import numpy as np

from .kernel import tree_shape
from .layout import CHILD_START, KIND, LEAF, N_CHILDREN, S_ACTIVE, S_LEARNED, S_ROOT


class MainTreeViews:
    """Root, nodes, size and depth of the main tree (alternates not included)."""

    tables_: tuple

    @property
    def root(self) -> int:
        """Node id of the main tree's root."""
        return int(self.tables_.state[S_ROOT])

    def main_nodes(self) -> np.ndarray:
        """Ids of the main tree's nodes, parents before children."""
        t = self.tables_
        out, stack = [], [self.root]
        while stack:
            n = stack.pop()
            out.append(n)
            if t.node_i[n, KIND] != LEAF:
                start, count = t.node_i[n, CHILD_START], t.node_i[n, N_CHILDREN]
                stack.extend(int(c) for c in t.child_table[start:start + count][::-1]
                             if c >= 0)
        return np.array(out, np.int64)

    @property
    def n_nodes(self) -> int:
        """Nodes of the main tree."""
        return int(tree_shape(self.tables_)[0])

    @property
    def n_leaves(self) -> int:
        """Leaves of the main tree."""
        return int(tree_shape(self.tables_)[1])

    @property
    def n_active_leaves(self) -> int:
        """Leaves holding statistics (alternate subtrees' included)."""
        return int(self.tables_.state[S_ACTIVE])

    @property
    def depth(self) -> int:
        """Edges on the longest root-to-leaf path of the main tree (0 for a lone root)."""
        return int(tree_shape(self.tables_)[2])

    @property
    def records_learned(self) -> int:
        return int(self.tables_.state[S_LEARNED])
