"""Redundancy among descriptors: a graph of pairs that add nothing to each other.

Two descriptors are *redundant* when (1) some feature of one is almost a
linear function of a feature of the other within the states (pooled
within-state |correlation| above a threshold) **and** (2) the two together do
not score better, by the search's own objective, than the better of the two
alone. Correlation alone is not enough: two descriptors whose within-state
fluctuations are shared while their state means shift differently are each a
poor CV, but a combination of them cancels the shared noise and separates the
states (the reason a linear discriminant beats single variables; Fisher,
Ann. Eugenics 7:179, 1936). Such a pair is kept apart so that the search can
combine it.

Representatives are chosen greedily, best score first: a descriptor is
*represented by* the best representative it is redundant with, else it
becomes a representative itself. Every descriptor a representative *stands
for* is thus directly redundant with it (no chains of correlation), and a user
can swap in a chemically nicer equivalent.
"""

import numpy as np

__all__ = ["descriptor_correlation", "redundancy_graph", "representatives"]


def descriptor_correlation(covariance, groups):
    """Largest |correlation| between the features of each pair of descriptors.

    Parameters
    ----------
    covariance : ndarray of shape (n_features, n_features)
        Pooled within-state covariance of the features.
    groups : sequence of array-like of int
        Feature indices of each descriptor.

    Returns
    -------
    ndarray of shape (n_descriptors, n_descriptors)
        Symmetric, in [0, 1]; 1 on the diagonal. A constant feature has
        correlation 0 with everything.

    Examples
    --------
    >>> import numpy as np
    >>> cov = np.array([[1.0, 0.9, 0.0], [0.9, 1.0, 0.0], [0.0, 0.0, 1.0]])
    >>> descriptor_correlation(cov, [[0], [1, 2]]).round(2).tolist()
    [[1.0, 0.9], [0.9, 1.0]]
    """
    covariance = np.asarray(covariance, dtype=np.float64)
    sd = np.sqrt(np.clip(np.diag(covariance), 0.0, None))
    ok = sd > 0
    denom = np.outer(np.where(ok, sd, 1.0), np.where(ok, sd, 1.0))
    corr = np.abs(covariance / denom)
    corr[~ok, :] = 0.0
    corr[:, ~ok] = 0.0
    n = len(groups)
    owner = np.concatenate([np.full(len(g), i) for i, g in enumerate(groups)]) if n else []
    flat = np.concatenate([np.asarray(g, dtype=np.intp) for g in groups]) if n else []
    sub = corr[np.ix_(flat, flat)] if n else np.zeros((0, 0))
    out = np.zeros((n, n))
    # max over the feature blocks of each pair of descriptors
    np.maximum.at(out, (owner[:, None].repeat(len(flat), 1), owner[None, :].repeat(len(flat), 0)),
                  sub)
    np.fill_diagonal(out, 1.0)
    return np.minimum(out, 1.0)


def redundancy_graph(correlation, threshold, *, nodes=None, adds_nothing=None):
    """Graph with an edge between redundant descriptors.

    Parameters
    ----------
    correlation : ndarray of shape (n, n)
        From :func:`descriptor_correlation`.
    threshold : float
        In (0, 1]: pairs with |correlation| above it are candidates.
    nodes : sequence of hashable, default=None
        Node names (default ``0 .. n-1``).
    adds_nothing : callable, default=None
        ``adds_nothing(i, j) -> bool`` for positions ``i < j``: True when the
        two descriptors together score no better than the better one alone
        (see :mod:`cvdesign.score.redundancy`). Only correlated pairs for which it
        returns True become edges. None: every correlated pair is an edge.

    Returns
    -------
    networkx.Graph
        Edge attribute ``r``: the |correlation|.

    Examples
    --------
    >>> import numpy as np
    >>> g = redundancy_graph(np.array([[1, .99, 0], [.99, 1, 0], [0, 0, 1.]]), 0.95,
    ...                      nodes=["a", "b", "c"])
    >>> sorted(g.edges)
    [('a', 'b')]
    """
    import networkx as nx  # here, not at import: worker processes do not need it

    correlation = np.asarray(correlation, dtype=np.float64)
    n = correlation.shape[0]
    nodes = list(range(n)) if nodes is None else list(nodes)
    graph = nx.Graph()
    graph.add_nodes_from(nodes)
    ii, jj = np.nonzero(np.triu(correlation > threshold, k=1))
    graph.add_edges_from((nodes[i], nodes[j], {"r": float(correlation[i, j])})
                         for i, j in zip(ii.tolist(), jj.tolist())
                         if adds_nothing is None or adds_nothing(i, j))
    return graph


def representatives(graph, score):
    """Representatives chosen greedily, best first, and what each stands for.

    Nodes are visited best score first; a node joins the best representative
    it shares an edge with, or else becomes a representative. Every node a
    representative stands for is its direct neighbour in `graph`.

    Parameters
    ----------
    graph : networkx.Graph
        From :func:`redundancy_graph`.
    score : mapping of node to float
        Higher is better; ties go to the node that sorts first.

    Returns
    -------
    list of (node, list of node)
        ``(representative, the others it stands for)``, best representative
        first; the others are sorted by score.

    Notes
    -----
    ``O(n log n + m)`` for ``n`` nodes and ``m`` edges.

    Examples
    --------
    A chain a - b - c: ``b`` stands for its neighbours; ``d`` stands alone.

    >>> import networkx as nx
    >>> g = nx.Graph([("a", "b"), ("b", "c")]); g.add_node("d")
    >>> representatives(g, {"a": 1.0, "b": 3.0, "c": 2.0, "d": 0.5})
    [('b', ['c', 'a']), ('d', [])]

    With ``c`` best, ``a`` is not redundant with ``c`` and stays a representative:

    >>> representatives(g, {"a": 1.0, "b": 2.0, "c": 3.0, "d": 0.5})
    [('c', ['b']), ('a', []), ('d', [])]
    """
    def key(node):
        return (-score[node], str(node))

    order = sorted(graph.nodes, key=key)
    rank = {node: i for i, node in enumerate(order)}
    stands_for = {}
    for node in order:
        reps = [n for n in graph.neighbors(node) if n in stands_for]
        if reps:
            stands_for[min(reps, key=rank.__getitem__)].append(node)
        else:
            stands_for[node] = []
    return [(rep, stands_for[rep]) for rep in order if rep in stands_for]
