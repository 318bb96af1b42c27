"""The on-disk cache of the habit engine's model tables (plugins/habit/disk_cache.py)."""

import numpy as np

from grainhabit.plugins.habit import classify_habit, disk_cache, engine


def test_cached_library_equals_a_fresh_build(tmp_path, monkeypatch):
    # reference: the same builder called without the cache, in this process
    monkeypatch.setenv("GRAINHABIT_CACHE", str(tmp_path))
    args = (0.5, 4.0, 0.1, 64, 0.02)
    fresh = engine._build_library.__wrapped__.uncached(*args)
    first = engine._build_library.__wrapped__(*args)  # builds and writes
    files = list(tmp_path.glob("engine._build_library-*.pickle"))
    assert len(files) == 1
    again = engine._build_library.__wrapped__(*args)  # reads the file
    for lib in (first, again):
        np.testing.assert_array_equal(lib.signatures, fresh.signatures)
        np.testing.assert_array_equal(lib.alphas, fresh.alphas)
        np.testing.assert_array_equal(lib.shape_id, fresh.shape_id)
        assert lib.faces == fresh.faces


def test_damaged_file_is_rebuilt_and_stale_files_go(tmp_path, monkeypatch):
    monkeypatch.setenv("GRAINHABIT_CACHE", str(tmp_path))
    build = classify_habit.family_signatures.__wrapped__
    want = build.uncached(32, 0)
    path = disk_cache.file_for("classify_habit.family_signatures", (32, 0))
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_bytes(b"not a pickle")
    import os
    import time

    # files of the same table built by other code: the KEEP_VERSIONS - 1 newest stay (another checkout may
    # use them), the older go
    stale = [path.with_name(path.name.rsplit("-", 1)[0] + f"-{i:016d}.pickle") for i in range(disk_cache.KEEP_VERSIONS)]
    now = time.time()
    for age, f in enumerate(stale):
        f.write_bytes(b"old code")
        os.utime(f, (now - 100 - age, now - 100 - age))  # stale[0] the newest
    got = build(32, 0)
    np.testing.assert_array_equal(got[1][0], want[1][0])
    assert path.is_file()
    assert [f.exists() for f in stale] == [True] * (disk_cache.KEEP_VERSIONS - 1) + [False]
    assert build(32, 0)[0].tolist() == want[0].tolist()


def test_cache_off_writes_nothing(tmp_path, monkeypatch):
    monkeypatch.setenv("GRAINHABIT_CACHE", "off")
    assert disk_cache.cache_folder() is None
    monkeypatch.setenv("HOME", str(tmp_path))
    classify_habit.family_signatures.__wrapped__(16, 0)
    assert not any(tmp_path.rglob("*.pickle"))
