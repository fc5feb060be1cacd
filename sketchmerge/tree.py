"""The reduction tree: which summaries merge into which, and how big each may grow.

Pure planning code (no I/O).  See docs/TREE.md for the design and its cost.

Units are sorted by address.  A group (one merge node) closes after a unit
whose address hashes to 0 modulo the fan-in, or when it reaches twice the
fan-in: boundaries depend on the addresses themselves, not on positions, so
adding, removing or rewriting one unit changes only the nodes on its path to
the root and, rarely, one neighbour; date-partitioned data that grows on the
right recomputes the right spine only.  Each level above groups the nodes
below the same way, by the address of each node's first unit.

Error budget (Chen & Guestrin 2016, Appendix A: merge keeps the larger error,
prune adds 1/b): for a target edge rank error E the final summary needs
eps <= 2E (queries answer within eps/2).  Leaves are pruned to ``ceil(1/E)``
entries (eps E, independent of the tree's depth so leaf blobs stay cached as
data grows); each of the L merge levels prunes to ``ceil(L / (E - s))`` where
``s`` covers the float32 rounding of every blob encode on the way up.
"""

from __future__ import annotations

import hashlib
import math
from dataclasses import dataclass

from .blob import F4_ROUNDING_SLACK
from .errors import InputError

__all__ = ["Node", "Plan", "a_priori_bound", "capacities", "node_key", "plan_tree"]


def _h(text: str) -> int:
    return int.from_bytes(hashlib.sha256(text.encode()).digest()[:8], "little")


def _group(addresses: list[str], fan_in: int, level: int) -> list[tuple[int, int]]:
    """Content-defined groups ``[start, stop)`` over sorted addresses.

    The hash is salted with the level so that a level always has fewer groups
    than items (an address that closed a group alone below need not do so above).
    """
    groups, start = [], 0
    n = len(addresses)
    for i, a in enumerate(addresses):
        if i + 1 - start >= 2 * fan_in or _h(f"{level}|{a}") % fan_in == 0 or i == n - 1:
            groups.append((start, i + 1))
            start = i + 1
    return groups


def capacities(rank_error: float, depth: int) -> tuple[int, int]:
    """(leaf capacity, node capacity) that certify edge rank error ``rank_error``."""
    if not 0.0 < rank_error < 0.5:
        raise InputError(f"rank error: expected a number in (0, 0.5), got {rank_error!r}")
    leaf = math.ceil(1.0 / rank_error)
    if depth == 0:
        return leaf, leaf
    avail = rank_error - (depth + 1) * F4_ROUNDING_SLACK
    if avail <= 0:
        raise InputError(f"rank error {rank_error:g} is too small for a tree of depth {depth}; "
                         f"expected at least {(depth + 2) * F4_ROUNDING_SLACK:.3g}")
    return leaf, math.ceil(depth / avail)


def a_priori_bound(rank_error: float, depth: int) -> float:
    """The summary error the plan certifies before any data is seen (<= 2 * rank_error)."""
    leaf, node = capacities(rank_error, depth)
    return 1.0 / leaf + depth / node + (depth + 1) * F4_ROUNDING_SLACK


def node_key(children: list[str], capacity: int, options_hash: str) -> str:
    """Cache key of a merge node: a hash of its children's keys and how it prunes."""
    h = hashlib.sha256(f"node|1|{options_hash}|{capacity}|".encode())
    for c in children:
        h.update(c.encode())
        h.update(b",")
    return h.hexdigest()


@dataclass(frozen=True)
class Node:
    key: str
    level: int                 # 0 = leaf (a work unit)
    children: tuple[str, ...]  # child keys (empty for leaves)
    address: str               # address of the first unit below


@dataclass(frozen=True)
class Plan:
    leaves: tuple[Node, ...]
    levels: tuple[tuple[Node, ...], ...]   # merge levels, bottom-up; the last holds the root
    depth: int
    leaf_capacity: int
    node_capacity: int

    @property
    def root(self) -> str | None:
        if self.levels:
            return self.levels[-1][0].key
        return self.leaves[0].key if self.leaves else None

    def all_keys(self) -> list[str]:
        keys = [n.key for n in self.leaves]
        for lvl in self.levels:
            keys.extend(n.key for n in lvl)
        return keys


def _shape(addresses: list[str], fan_in: int) -> list[list[tuple[int, int]]]:
    shape, items = [], list(addresses)
    while len(items) > 1:
        groups = _group(items, fan_in, len(shape) + 1)
        if len(groups) == len(items):  # no progress at this level: close by count instead
            groups = [(i, min(i + fan_in, len(items))) for i in range(0, len(items), fan_in)]
        shape.append(groups)
        items = [items[a] for a, _ in groups]
    return shape


def plan_tree(leaf_keys: list[str], addresses: list[str], fan_in: int, rank_error: float,
              options_hash: str) -> Plan:
    """Plan the reduction over leaves sorted by address (``leaf_keys[i]`` is at ``addresses[i]``)."""
    if fan_in < 2:
        raise InputError(f"fan-in: expected at least 2, got {fan_in}")
    if list(addresses) != sorted(addresses):
        raise ValueError("plan_tree: addresses must be sorted")
    shape = _shape(addresses, fan_in)
    depth = len(shape)
    leaf_cap, node_cap = capacities(rank_error, depth)
    leaves = tuple(Node(k, 0, (), a) for k, a in zip(leaf_keys, addresses))
    below = list(leaves)
    levels = []
    for lvl, groups in enumerate(shape, start=1):
        nodes = []
        for a, b in groups:
            kids = below[a:b]
            keys = [k.key for k in kids]
            nodes.append(Node(node_key(keys, node_cap, options_hash), lvl, tuple(keys), kids[0].address))
        levels.append(tuple(nodes))
        below = nodes
    return Plan(leaves, tuple(levels), depth, leaf_cap, node_cap)
