"""Indexed binary min-heaps, many in one flat array, for the greedy kernels.

Every item (a variable, 0..n-1) sits in at most one heap at a time. Heap ``g`` owns the
slots ``base[g] .. base[g] + cap[g] - 1`` of the flat arrays; ``size[g]`` of them are in
use. Arrays (all numba-friendly):

* ``key`` float64 (slots,), ``item`` int64 (slots,): the entry at each slot;
* ``slot`` int64 (n,): where item i sits (absolute slot), -1 when in no heap;
* ``heap`` int64 (n,): which heap item i is in (meaningful when ``slot[i] >= 0``);
* ``base``, ``size`` int64 (heaps,).

Order: smaller key first, then the smaller item (deterministic ties). Setting a key,
moving an item to another heap and removing it each cost O(log size).
"""

from __future__ import annotations

import numba as nb

__all__ = ["heap_set", "heap_remove"]


@nb.njit(cache=True, inline="always")
def _before(key, item, a, b):
    return key[a] < key[b] or (key[a] == key[b] and item[a] < item[b])


@nb.njit(cache=True, inline="always")
def _swap(key, item, slot, a, b):
    key[a], key[b] = key[b], key[a]
    item[a], item[b] = item[b], item[a]
    slot[item[a]] = a
    slot[item[b]] = b


@nb.njit(cache=True, inline="always")
def _sift(key, item, slot, b0, sz, c):
    """Restore the order around slot c of the heap starting at b0 with sz entries."""
    while c > b0:  # up
        p = b0 + (c - b0 - 1) // 2
        if not _before(key, item, c, p):
            break
        _swap(key, item, slot, c, p)
        c = p
    while True:  # down
        l = b0 + 2 * (c - b0) + 1
        if l >= b0 + sz:
            return
        if l + 1 < b0 + sz and _before(key, item, l + 1, l):
            l += 1
        if not _before(key, item, l, c):
            return
        _swap(key, item, slot, l, c)
        c = l


@nb.njit(cache=True, inline="always")
def heap_remove(key, item, slot, heap, base, size, i):
    """Take item i out of its heap (no-op when it is in none)."""
    s = slot[i]
    if s < 0:
        return
    g = heap[i]
    b0 = base[g]
    last = b0 + size[g] - 1
    if s != last:
        _swap(key, item, slot, s, last)
    size[g] -= 1
    slot[i] = -1
    if s != last:
        _sift(key, item, slot, b0, size[g], s)


@nb.njit(cache=True, inline="always")
def heap_set(key, item, slot, heap, base, size, i, g, value):
    """Put item i into heap g with key ``value`` (moving it from its heap if needed)."""
    if slot[i] >= 0 and heap[i] != g:
        heap_remove(key, item, slot, heap, base, size, i)
    s = slot[i]
    if s < 0:
        s = base[g] + size[g]
        size[g] += 1
        item[s] = i
        slot[i] = s
        heap[i] = g
    key[s] = value
    _sift(key, item, slot, base[g], size[g], s)
