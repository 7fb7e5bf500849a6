"""The fixed reduction tree: merges in an order that does not depend on how work was split.

Floating-point merges are not associative, so the order of merges is fixed
by the data, not by the execution: over ``n`` leaves, node ``(h, k)`` stands
for leaves ``[k 2^h, (k + 1) 2^h)`` (clipped to ``n``) and its value is
``merge(node(h - 1, 2k), node(h - 1, 2k + 1))``, or its left child alone
when the right one holds no leaf. A :class:`TreeReducer` accepts node values
in any order and from any producer (a task reduces its own leaves with one
too, then hands over what it could not complete), merging a node with its
sibling as soon as both are there; the root is the same whatever the split
and the order of arrival.
"""

__all__ = ["TreeReducer", "merge_optional"]


def merge_optional(merge, a, b):
    """``merge(a, b)``, with None standing for "no frames" on either side."""
    if a is None:
        return b
    if b is None:
        return a
    return merge(a, b)


class TreeReducer:
    """Reduce the values of `n` ordered leaves in the fixed balanced tree.

    Parameters
    ----------
    n : int
        Number of leaves (>= 1).
    merge : callable
        ``merge(left, right)``; None values are skipped (see :func:`merge_optional`).

    Attributes
    ----------
    height : int
        Height of the root (``2**height >= n``).
    done : bool
        Whether the root is known.
    root : object
        The root value, once `done`.

    Examples
    --------
    >>> r = TreeReducer(5, lambda a, b: f"({a}{b})")
    >>> for k in (3, 0, 4, 2, 1):
    ...     r.add(0, k, "abcde"[k])
    >>> r.root
    '(((ab)(cd))e)'
    """

    def __init__(self, n, merge):
        if n < 1:
            raise ValueError(f"n={n!r} must be >= 1")
        self.n = int(n)
        self.merge = merge
        self.height = (self.n - 1).bit_length()
        self.pending = {}
        self.done = False
        self.root = None

    def add(self, h, k, value):
        """Add the value of node ``(h, k)``, merging upwards while siblings are present."""
        if self.done:
            raise ValueError("the root is already complete")
        while h < self.height:
            if k % 2 == 0 and (k + 1) << h >= self.n:  # empty right sibling: lift
                h, k = h + 1, k // 2
                continue
            sib = k ^ 1
            other = self.pending.pop((h, sib), _MISSING)
            if other is _MISSING:
                if (h, k) in self.pending:
                    raise ValueError(f"node {(h, k)} was added twice")
                self.pending[(h, k)] = value
                return
            value = (merge_optional(self.merge, other, value) if sib < k else
                     merge_optional(self.merge, value, other))
            h, k = h + 1, k // 2
        self.root = value
        self.done = True

    def nodes(self):
        """Pending ``(h, k, value)`` nodes, and the root as ``(height, 0, root)`` once done."""
        if self.done:
            return [(self.height, 0, self.root)]
        return [(h, k, v) for (h, k), v in sorted(self.pending.items(), key=lambda i: i[0][1]
                                                  << i[0][0])]


_MISSING = object()
