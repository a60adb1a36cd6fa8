"""Small stores of recent results (reduced cells, stencils, shortest distances, plans), kept by key.

Each store is a plain dict holding at most a few dozen entries, the oldest dropped first. Several
Python threads may use one store at once (an ASE calculator per thread, Dask workers): dropping
an entry another thread has just dropped, or finding the store emptied meanwhile, is harmless.
"""


def remember(store, keep, key, value):
    """Put ``key: value`` into ``store``, first dropping the oldest entries beyond ``keep - 1``."""
    try:
        while len(store) >= keep:
            store.pop(next(iter(store)), None)
    except (RuntimeError, StopIteration):   # another thread changed the store meanwhile: keep one more
        pass
    store[key] = value
