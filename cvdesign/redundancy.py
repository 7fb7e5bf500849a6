"""Redundancy among descriptors: a correlation graph and one representative per group.

Two descriptors are *redundant* when some feature of one is almost a linear
function of a feature of the other, within the states: their pooled
within-state |correlation| exceeds a threshold. The graph with an edge for
every redundant pair is split into connected components; each component is
represented by its best-scoring descriptor, which *stands for* the others, so
that a user can swap in a chemically nicer equivalent.
"""

import networkx as nx
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


def redundancy_graph(correlation, threshold, *, nodes=None):
    """Graph with an edge between descriptors whose |correlation| exceeds `threshold`.

    Parameters
    ----------
    correlation : ndarray of shape (n, n)
        From :func:`descriptor_correlation`.
    threshold : float
        In (0, 1].
    nodes : sequence of hashable, default=None
        Node names (default ``0 .. n-1``).

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
    correlation = np.asarray(correlation, dtype=np.float64)
    n = correlation.shape[0]
    nodes = list(range(n)) if nodes is None else list(nodes)
    graph = nx.Graph()
    graph.add_nodes_from(nodes)
    ii, jj = np.nonzero(np.triu(correlation > threshold, k=1))
    graph.add_edges_from((nodes[i], nodes[j], {"r": float(correlation[i, j])})
                         for i, j in zip(ii, jj))
    return graph


def representatives(graph, score):
    """One representative per connected component: the best-scoring descriptor.

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

    Examples
    --------
    >>> import networkx as nx
    >>> g = nx.Graph([("a", "b"), ("b", "c")]); g.add_node("d")
    >>> representatives(g, {"a": 1.0, "b": 3.0, "c": 2.0, "d": 0.5})
    [('b', ['c', 'a']), ('d', [])]
    """
    def key(node):
        return (-score[node], str(node))

    out = []
    for comp in nx.connected_components(graph):
        members = sorted(comp, key=key)
        out.append((members[0], members[1:]))
    out.sort(key=lambda t: key(t[0]))
    return out
