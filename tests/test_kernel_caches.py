"""The greedy package drops its numba caches when any of its sources changes.

numba keys a cached kernel by its own file only, while a caller's cached code holds its
callees' code from sibling modules; ``drop_stale`` keeps them in step. Checked here on a
scratch folder standing in for the package.
"""

from __future__ import annotations

from flipfix.repair.kernels.cache import drop_stale


def _cached(folder):
    return sorted(p.name for p in (folder / "__pycache__").glob("*.nb?"))


def test_caches_survive_until_a_source_changes(tmp_path):
    (tmp_path / "a.py").write_text("x = 1\n")
    (tmp_path / "b.py").write_text("y = 2\n")
    drop_stale(tmp_path)  # first sight: the digest is written
    cache = tmp_path / "__pycache__"
    for name in ("a.f-1.py311.nbi", "a.f-1.py311.1.nbc"):
        (cache / name).write_text("compiled")
    drop_stale(tmp_path)  # the same sources: kept
    assert _cached(tmp_path) == ["a.f-1.py311.1.nbc", "a.f-1.py311.nbi"]
    (tmp_path / "b.py").write_text("y = 3\n")  # a callee's module changes
    drop_stale(tmp_path)
    assert _cached(tmp_path) == []
    (cache / "a.f-1.py311.nbi").write_text("compiled again")
    drop_stale(tmp_path)  # the new digest was kept: nothing more to drop
    assert _cached(tmp_path) == ["a.f-1.py311.nbi"]


def test_a_change_to_a_file_outside_the_folder_listed_in_also_drops_the_caches(tmp_path):
    pkg, other = tmp_path / "pkg", tmp_path / "rows.py"
    pkg.mkdir()
    (pkg / "a.py").write_text("x = 1\n")
    other.write_text("def row_viol(): pass\n")
    drop_stale(pkg, also=(str(other),))
    (pkg / "__pycache__" / "a.f-1.py311.nbi").write_text("compiled")
    drop_stale(pkg, also=(str(other),))
    assert _cached(pkg) == ["a.f-1.py311.nbi"]
    other.write_text("def row_viol(): return 0\n")  # the shared callee changes
    drop_stale(pkg, also=(str(other),))
    assert _cached(pkg) == []
