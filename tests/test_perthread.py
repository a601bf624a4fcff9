"""groupsrc.stats.engine.perthread.PerThread: one value per thread, kept until cleared,
never pickled (the project's own contract for work buffers, DEVELOPERS.md)."""

import pickle
import threading

from groupsrc.stats.engine.perthread import PerThread


def test_one_value_per_thread_made_once():
    store, made = PerThread(), []

    def make():
        made.append(threading.get_ident())
        return [threading.get_ident()]

    mine = store.get(make)
    assert store.get(make) is mine                 # kept, not made again
    seen = []
    t = threading.Thread(target=lambda: seen.append(store.get(make)))
    t.start()
    t.join()
    assert seen[0] is not mine and len(made) == 2  # the other thread made its own


def test_fits_remakes_and_clear_drops():
    store = PerThread()
    small = store.get(lambda: [0] * 2)
    assert store.get(lambda: [0] * 4, fits=lambda v: len(v) >= 4) is not small
    assert len(store.get(lambda: [], fits=lambda v: len(v) >= 3)) == 4   # still fits
    store.clear()
    assert store.get(lambda: "new") == "new"


def test_a_pickled_copy_starts_empty():
    store = PerThread()
    store.get(lambda: [1, 2, 3])
    copy = pickle.loads(pickle.dumps(store))
    assert copy.get(lambda: "fresh") == "fresh"
