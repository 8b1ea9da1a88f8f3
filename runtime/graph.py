"""Graph algorithms on plain integer graphs (states 0..n-1, edges (i, j)).

Shared by the runtime (numeric elimination, thermodynamics) and the
compiler's structure analysis, which adds input validation on top. Every
traversal is iterative: schemes of 10,000 states must not hit Python's
recursion limit.
"""

from __future__ import annotations

from collections import deque


def _successors(n: int, edges) -> list[list[int]]:
    succ: list[set[int]] = [set() for _ in range(n)]
    for i, j in edges:
        if i != j:
            succ[i].add(j)
    return [sorted(s) for s in succ]


def strongly_connected_components(n: int, edges) -> list[list[int]]:
    """Strongly connected components, each sorted, ordered by smallest member.

    Tarjan's algorithm (SIAM J. Comput. 1 (1972) 146–160) with an explicit stack, O(n + m).

    >>> strongly_connected_components(4, [(0, 1), (1, 0), (1, 2), (3, 2)])
    [[0, 1], [2], [3]]
    """
    succ = _successors(n, edges)
    index = [-1] * n
    low = [0] * n
    on_stack = [False] * n
    stack: list[int] = []
    comps: list[list[int]] = []
    counter = 0
    for start in range(n):
        if index[start] != -1:
            continue
        index[start] = low[start] = counter
        counter += 1
        stack.append(start)
        on_stack[start] = True
        work = [[start, 0]]
        while work:
            frame = work[-1]
            v, pos = frame
            if pos < len(succ[v]):
                frame[1] = pos + 1
                w = succ[v][pos]
                if index[w] == -1:
                    index[w] = low[w] = counter
                    counter += 1
                    stack.append(w)
                    on_stack[w] = True
                    work.append([w, 0])
                elif on_stack[w] and index[w] < low[v]:
                    low[v] = index[w]
                continue
            work.pop()
            if work:
                u = work[-1][0]
                if low[v] < low[u]:
                    low[u] = low[v]
            if low[v] == index[v]:
                comp = []
                while True:
                    w = stack.pop()
                    on_stack[w] = False
                    comp.append(w)
                    if w == v:
                        break
                comps.append(sorted(comp))
    comps.sort(key=lambda c: c[0])
    return comps


def terminal_components(n: int, edges) -> list[list[int]]:
    """Strongly connected components with no edge leaving them (closed classes).

    The stationary distributions of the chain are supported on these; there is
    one extreme stationary distribution per terminal component. Same ordering
    as :func:`strongly_connected_components`.

    >>> terminal_components(3, [(0, 1), (0, 2)])
    [[1], [2]]
    """
    comps = strongly_connected_components(n, edges)
    owner = [0] * n
    for c, comp in enumerate(comps):
        for s in comp:
            owner[s] = c
    leaves = [True] * len(comps)
    for i, j in edges:
        if owner[i] != owner[j]:
            leaves[owner[i]] = False
    return [comp for c, comp in enumerate(comps) if leaves[c]]


def fundamental_cycles(n: int, edges) -> list[tuple[list[int], tuple[int, int]]]:
    """Fundamental cycles of the undirected skeleton, with their chords.

    A breadth-first spanning tree is grown from the smallest state of each
    connected part (neighbours in increasing order). Every non-tree pair
    {u, v} (u < v, in increasing order) closes one cycle, listed as
    ``[a, ..., u, v, ..., b]`` where a is the lowest common ancestor of u and
    v; the cycle is traversed in list order and closes with b→a. Its chord is
    (u, v). There are m_skeleton − n + (number of connected parts) cycles,
    a basis of the cycle space.

    >>> fundamental_cycles(3, [(0, 1), (1, 2), (2, 0)])
    [([0, 1, 2], (1, 2))]
    """
    nbrs: list[set] = [set() for _ in range(n)]
    for i, j in edges:
        if i != j:
            nbrs[i].add(j)
            nbrs[j].add(i)
    order = [sorted(s) for s in nbrs]
    parent = [-1] * n
    depth = [-1] * n
    for root in range(n):
        if depth[root] != -1:
            continue
        depth[root] = 0
        queue = deque([root])
        while queue:
            a = queue.popleft()
            for b in order[a]:
                if depth[b] == -1:
                    depth[b] = depth[a] + 1
                    parent[b] = a
                    queue.append(b)
    cycles = []
    for u in range(n):
        for v in order[u]:
            if v <= u or parent[v] == u or parent[u] == v:
                continue
            up_u, up_v = [u], [v]
            a, b = u, v
            while depth[a] > depth[b]:
                a = parent[a]
                up_u.append(a)
            while depth[b] > depth[a]:
                b = parent[b]
                up_v.append(b)
            while a != b:
                a, b = parent[a], parent[b]
                up_u.append(a)
                up_v.append(b)
            cycles.append((up_u[::-1] + up_v[:-1], (u, v)))
    return cycles


class BreadthFirstTree:
    """Parents of a breadth-first spanning forest of the undirected skeleton."""

    def __init__(self, parent: list[int], order: list[int]):
        self.parent = parent  # -1 at each root
        self.order = order    # every state, each after its parent


def breadth_first_parents(n: int, edges) -> BreadthFirstTree:
    """Breadth-first forest from the smallest state of each connected part,
    neighbours in increasing order."""
    nbrs: list[set] = [set() for _ in range(n)]
    for i, j in edges:
        if i != j:
            nbrs[i].add(j)
            nbrs[j].add(i)
    parent = [-1] * n
    seen = [False] * n
    order = []
    for root in range(n):
        if seen[root]:
            continue
        seen[root] = True
        queue = deque([root])
        while queue:
            a = queue.popleft()
            order.append(a)
            for b in sorted(nbrs[a]):
                if not seen[b]:
                    seen[b] = True
                    parent[b] = a
                    queue.append(b)
    return BreadthFirstTree(parent, order)
