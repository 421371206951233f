"""The road a vehicle left a stand by, read from the fixes after the stand.

Rule ``MatchSettings.stand_way_out`` (called by
:meth:`livematch.core.tracker.Tracker._way_out_of_stand` on a chain about to be
committed). Where the committed path leaves a vertex V by a segment S, the vehicle
stood at V (the first nodes matched past V have fixes within eps of V for a stand, as
the tracker reads one) and the path then reaches a later vertex B, another way from V
to B that does not begin with S may fit the fixes of the drive-off better: a van stood
at a junction while its GNSS error leaned towards a side road for half a minute, the
path cost charged each of those fixes as independent and so took the side road, and
the side road met the street the van drove a few metres further on ("a diamond": two
ways out of V that join again at B).

The fixes of the stand say where the vehicle was (at V) but not which road it left V
by: within eps of V both ways are as good, and their error leans as a whole, so the
cost the path saved on them is no evidence. The fixes after the stand, up to B, are.
So the two ways out are compared on those fixes only, with the path cost's own
distance term (squared distance over 2 ``sigma_m``^2, summed), and the other way is
taken where it fits them better by more than :data:`WAY_OUT_MARGIN`. Every node from
the stand to B is then put on the other way where its fix projects (in order, each
within eps), the path before V and after B unchanged.

The certificate holds as for the other stand rules: the path up to V keeps its
matching; from the fix before the stand on, every fix up to B lies within eps of its
point on the new way, the points in order along it; the node after B is reached from
B along the path's own segments, as the sweep reached it.

Pure: reads the network view and the nodes it is given, returns new nodes.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from typing import Final

from livematch.core.sweep import Node
from livematch.core.view import NetworkView

# The other way must fit the drive-off's fixes better than the path by more than this
# (the path cost's distance term, summed over those fixes). One unit: a vehicle that
# stood at V and left by S, with fixes that happen to lie a little nearer another way,
# keeps S unless the fixes say so clearly (chosen by judgement, not tuned).
WAY_OUT_MARGIN: Final = 1.0
# The later vertex B where the ways join again lies at most this far along the path from
# V (metres): a diamond at a junction, not a second route across the district.
WAY_OUT_REACH_M: Final = 120.0
# At most this many segments in the other way, and this many ways looked at per B.
WAY_OUT_SEGS: Final = 10
WAY_OUT_WAYS: Final = 32

FixOf = Callable[[Node], "tuple[float, float] | None"]
Stands = Callable[[Node, list[Node]], bool]


def way_out_of_stand(view: NetworkView, chain: list[Node], before: Node, eps: float,
                     sigma_m: float, fix_of: FixOf, stands: Stands) -> list[Node]:
    """``chain`` with the road out of a stand's vertex chosen by the drive-off's fixes.

    ``before``: the node before the chain (committed already). ``fix_of(node)``: the
    fix a node answers, or None if it is no longer logged. ``stands(prev, nodes)``:
    whether the fixes of ``nodes`` (all within eps of one vertex, ``prev`` the node
    before them) are a stand, as the tracker reads one. Returns ``chain`` itself when
    nothing changes. See the module docstring for the rule.

    Example (a straight road: one way out of every vertex, nothing changes):
        >>> from livematch.core.build import Road, network_from_roads
        >>> from livematch.core.view import view_of
        >>> net = network_from_roads([Road([(0.0, 0.0), (50.0, 0.0), (100.0, 0.0)], way=1)])
        >>> view = view_of(net)
        >>> a = Node(0, 1, 0.0, 0.5, 25.0, 0.0, None, (), 0.0, 0.0)
        >>> b = Node(2, 2, 1.0, 0.5, 75.0, 0.0, a, (), 0.0, 0.0)
        >>> c = Node(2, 3, 2.0, 0.9, 95.0, 0.0, b, (), 0.0, 0.0)
        >>> way_out_of_stand(view, [b, c], a, 15.0, 5.0, lambda n: (n.x, n.y),
        ...                  lambda p, ns: True) == [b, c]
        True
    """
    sf, st, slen, twin = view.sf, view.st, view.slen, view.twin
    segs = [before.seg]
    owner = [-1]  # owner[m]: the chain index of the node whose step entered segs[m]
    for k, node in enumerate(chain):
        if node.via or node.seg != segs[-1]:
            for seg in (*node.via, node.seg):
                segs.append(seg)
                owner.append(k)
    if len(segs) < 3:
        return chain
    at = [0] * len(chain)  # node k sits on segs[at[k]]
    for m, k in enumerate(owner):
        if k >= 0:
            at[k] = m
    for k in range(1, len(chain)):
        at[k] = max(at[k], at[k - 1])
    radius2 = eps * eps
    inv = 0.5 / (sigma_m * sigma_m)
    best: tuple[float, int, int, int, list[int], list[tuple[int, float, float, float]]] | None
    best = None  # (gain, p, q, first node, way, points)
    for p in range(1, len(segs) - 1):
        if at[-1] <= p:
            break  # the chain must go on past the stand's way out
        v = sf[segs[p]]
        vx, vy = view.vx[v], view.vy[v]
        if len(view.out[v]) < 2:
            continue  # one way out of V
        first = next(k for k in range(len(chain)) if at[k] >= p)
        prev = chain[first - 1] if first else before

        def near_v(node: Node) -> bool:
            f = fix_of(node)
            return f is not None and (f[0] - vx) ** 2 + (f[1] - vy) ** 2 <= radius2  # noqa: B023

        end = first
        while end < len(chain) and near_v(chain[end]):
            end += 1
        if end == first or end == len(chain) or not near_v(prev) \
                or not stands(prev, chain[first:end]):
            continue
        path_m = 0.0
        for q in range(p, len(segs) - 1):
            path_m += slen[segs[q]]
            if path_m > WAY_OUT_REACH_M or at[-1] <= q:
                break
            drive = [k for k in range(end, len(chain)) if at[k] <= q]
            if not drive:
                continue  # no fix after the stand before B: no evidence
            last = drive[-1]
            old = 0.0
            for k in drive:
                f = fix_of(chain[k])
                if f is None:
                    old = -1.0
                    break
                old += (chain[k].x - f[0]) ** 2 + (chain[k].y - f[1]) ** 2
            if old < 0.0:
                continue
            after = segs[q + 1]
            for way in _ways(view, v, st[segs[q]], segs[p], path_m + eps):
                if twin[way[-1]] == after and after >= 0:
                    continue  # a U-turn at B
                pts = _fit(view, way, [fix_of(chain[k]) for k in range(first, last + 1)],
                           radius2)
                if pts is None:
                    continue
                new = 0.0
                for k in drive:
                    f = fix_of(chain[k])
                    assert f is not None
                    _, _, px, py = pts[k - first]
                    new += (px - f[0]) ** 2 + (py - f[1]) ** 2
                gain = (old - new) * inv
                if gain > WAY_OUT_MARGIN and (best is None or gain > best[0]):
                    best = (gain, p, q, first, way, pts)
    if best is None:
        return chain
    _, p, q, first, way, pts = best
    new_segs = [*segs[:p], *way, *segs[q + 1:]]
    shift = p + len(way) - (q + 1)  # index change of the segments from segs[q + 1] on
    placed: list[tuple[Node, int]] = []
    for k, node in enumerate(chain):
        if k < first:
            here = at[k]
        elif k < first + len(pts):
            w, pos, x, y = pts[k - first]
            here = p + w
            node = Node(way[w], node.seq, node.t, pos, x, y, None, (), node.cost, pos)
        else:
            here = at[k] + shift
        placed.append((node, here))
    return relink(placed, before, new_segs)


def relink(placed: list[tuple[Node, int]], before: Node, new_segs: list[int]) -> list[Node]:
    """Chain nodes onto a rewritten path: each node's parent and the segments between.

    ``placed``: each node in order with the index in ``new_segs`` of the segment it sits
    on (the path starts at ``before``'s segment, index 0). Each node gets the one before
    it as parent and the path's segments strictly between the two as ``via``. Shared by
    the rules that rewrite a committed chain round a stand (this module's, and
    ``Tracker._rebuilt_turn``).
    """
    out: list[Node] = []
    parent = before
    prev_at = 0
    for node, here in placed:
        node.parent = parent
        node.via = tuple(new_segs[m] for m in range(prev_at + 1, here))
        out.append(node)
        parent = node
        prev_at = here
    return out


def _ways(view: NetworkView, v: int, b: int, not_first: int, max_m: float) -> Iterator[list[int]]:
    """Ways from vertex ``v`` to vertex ``b`` not beginning with ``not_first``.

    Simple (no vertex twice), no U-turn, at most ``max_m`` long and ``WAY_OUT_SEGS``
    segments; at most ``WAY_OUT_WAYS`` of them, depth first.
    """
    found = 0
    stack: list[tuple[int, list[int], float, frozenset[int]]] = [
        (seg, [seg], view.slen[seg], frozenset((v,))) for seg in view.out[v]
        if seg != not_first]
    while stack and found < WAY_OUT_WAYS:
        seg, way, length, seen = stack.pop()
        if length > max_m:
            continue
        head = view.st[seg]
        if head == b:
            found += 1
            yield way
            continue
        if head in seen or len(way) >= WAY_OUT_SEGS:
            continue
        seen = seen | {head}
        for nxt in view.out[head]:
            if nxt != view.twin[seg] and view.st[nxt] not in seen:
                stack.append((nxt, [*way, nxt], length + view.slen[nxt], seen))


def _fit(view: NetworkView, way: list[int], fixes: list[tuple[float, float] | None],
         radius2: float) -> list[tuple[int, float, float, float]] | None:
    """Each fix's nearest point on ``way``, in order along it, or None.

    As (index in ``way``, position on that segment, x, y); None where a fix is missing
    or its point lies farther than the radius (``radius2``, squared) from it. A point
    never lies before the one of the fix before: the vehicle goes on along the way.
    """
    out: list[tuple[int, float, float, float]] = []
    w, low = 0, 0.0
    for f in fixes:
        if f is None:
            return None
        x, y = f
        hit = project_on(view, way, w, low, x, y)
        if hit is None or (hit[2] - x) ** 2 + (hit[3] - y) ** 2 > radius2:
            return None
        w, low = hit[0], hit[1]
        out.append(hit)
    return out


def project_on(view: NetworkView, way: list[int], w: int, low: float, x: float,
                y: float) -> tuple[int, float, float, float] | None:
    """The nearest point to (``x``, ``y``) on ``way`` at or after ``way[w]`` at ``low``.

    Returns (index in ``way``, position on that segment, x, y), or None if ``way`` ends
    before ``w``. Positions before ``low`` on ``way[w]`` are not taken: the points of
    consecutive fixes go on along the way, never back. Shared by the rules that move a
    stand's fixes onto a new way (this module's and ``stand_turnback``'s).
    """
    best: tuple[float, tuple[int, float, float, float]] | None = None
    for m in range(w, len(way)):
        seg = way[m]
        a, b = view.sf[seg], view.st[seg]
        ax, ay = float(view.vx[a]), float(view.vy[a])
        dx, dy = float(view.vx[b]) - ax, float(view.vy[b]) - ay
        n2 = dx * dx + dy * dy
        pos = ((x - ax) * dx + (y - ay) * dy) / n2 if n2 > 0.0 else 0.0
        pos = min(1.0, max(low if m == w else 0.0, pos))
        px, py = ax + pos * dx, ay + pos * dy
        d = (px - x) ** 2 + (py - y) ** 2
        if best is None or d < best[0]:
            best = (d, (m, pos, px, py))
    return None if best is None else best[1]
