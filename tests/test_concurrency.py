"""Concurrency and memory: the model cache behind references shared across cells.

Eight threads hammer the same and different models through the published functions; every result must
be the very float a serial call gives. The cache stays within its documented cap (LRU eviction of
what is cheapest to recover first), and an evicted model is rebuilt from its content, never a stale
or wrong number.
"""
from __future__ import annotations

import sys
import threading
import warnings
from concurrent.futures import ThreadPoolExecutor

import numpy as np
import pytest

import layerwise.engine as lw
from layerwise.addin import cells, handles
from layerwise.addin.functions import FUNCTIONS as F

pytestmark = pytest.mark.filterwarnings("ignore::layerwise.engine.errors.GridWarning")
THREADS = 8


@pytest.fixture
def fresh_cache():
    cap = handles.memory_cap()
    handles.CACHE.clear(reset_counts=True)
    old = sys.getswitchinterval()
    sys.setswitchinterval(1e-5)  # switch threads often: races show up sooner
    yield handles.CACHE
    sys.setswitchinterval(old)
    handles.set_memory_cap(cap)
    handles.CACHE.clear(reset_counts=True)


def column(v):
    return [[float(x)] for x in v]


def workload():
    """Model builder calls and a list of (function, args) cells using them."""
    rng = np.random.default_rng(77)
    losses = rng.lognormal(13.8, 1.1, 3000)
    years = rng.integers(1, 1001, 4000).astype(float)
    events = rng.pareto(1.7, 4000) * 4e5
    builders = {
        "fs1": ("LW_MODEL_FREQSEV", ("poisson 2", "lognormal 1e6 1.5")),
        "fs2": ("LW_MODEL_FREQSEV", ("negative binomial 3 0.8", "gamma 5e5 0.9")),
        "fs3": ("LW_MODEL_FREQSEV", ("poisson 1", "pareto 1.8 1e6")),
        "ylt": ("LW_MODEL_YEARLOSS", (column(losses),)),
        "yet": ("LW_MODEL_YEAREVENT", (column(years), column(events), 1000.0)),
        "scen": ("LW_MODEL_SCENARIOS", (column([0, 1e6, 5e6, 2e7]), column([0.6, 0.3, 0.08, 0.02]))),
    }
    cells_ = []
    for key in builders:
        for a, l in ((0.0, 1e6), (1e6, 2e6), (2e6, 5e6), (5e5, "unlimited")):
            for g in ("wang 0.3", "ph 0.8", "tvar 0.99"):
                cells_.append(("LW_PREMIUM", key, (a, l, g)))
            cells_.append(("LW_EXPECTED_LOSS", key, (a, l)))
            cells_.append(("LW_LAYER_STAT", key, (a, l, "std")))
        cells_.append(("LW_TOWER", key, ([[5e5]], [[1e6], [2e6], [5e6]], [["wang 0.3"], ["dual 1.5"]])))
        cells_.append(("LW_MODEL_INFO", key, ()))
    return builders, cells_


def evaluate(builders, cell):
    """One cell: build (or find) the model as its builder cell would, then call the function."""
    name, key, args = cell
    fn, bargs = builders[key]
    ref = F[fn](*bargs)
    out = F[name](ref, *args)
    if name == "LW_MODEL_INFO":  # memory and build counts change with the cache: compare the numbers only
        out = [row for row in out if row[0] not in ("memory bytes", "builds")]
    return out


def same(a, b):
    """Exactly the same cell values (floats bit for bit)."""
    return repr(a) == repr(b)


def test_eight_threads_give_the_serial_results(fresh_cache):
    builders, work = workload()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        serial = [evaluate(builders, c) for c in work]
    handles.CACHE.clear(reset_counts=True)  # the threads start cold: they race to build too
    jobs = list(range(len(work))) * 3
    np.random.default_rng(5).shuffle(jobs)
    barrier = threading.Barrier(THREADS)

    def run(chunk):
        barrier.wait()
        return [(i, evaluate(builders, work[i])) for i in chunk]

    chunks = [jobs[t::THREADS] for t in range(THREADS)]
    with ThreadPoolExecutor(THREADS) as pool:
        results = [r for part in pool.map(run, chunks) for r in part]
    assert len(results) == len(jobs)
    for i, out in results:
        assert same(out, serial[i]), (work[i], out, serial[i])
    # each model was built once although eight threads asked for it at the same time
    for fn, bargs in builders.values():
        assert handles.build_count(F[fn](*bargs)) == 1


def test_hammering_one_model_with_fresh_grids(fresh_cache):
    """Many threads asking one model for the same new per-occurrence grid at once."""
    ref = F["LW_MODEL_FREQSEV"]("poisson 3", "weibull 0.7 1e6")
    terms = [(a, l) for a in (0.0, 3e5, 1e6, 2.5e6) for l in (5e5, 2e6, 7e6)]
    model = lw.FrequencySeverity(lw.poisson(3), lw.weibull(0.7, 1e6))
    want = {t: F["LW_PREMIUM"](handles.freqsev_spec(model.frequency, model.severity), *t, "wang 0.25") for t in terms}
    handles.CACHE.clear(reset_counts=True)
    barrier = threading.Barrier(THREADS)

    def run(seed):
        barrier.wait()
        order = list(terms)
        np.random.default_rng(seed).shuffle(order)
        return [(t, F["LW_PREMIUM"](ref, *t, "wang 0.25"), F["LW_MODEL_INFO"](ref)) for t in order]

    with ThreadPoolExecutor(THREADS) as pool:
        for part in pool.map(run, range(THREADS)):
            for t, got, info in part:
                assert same(got, want[t]), (t, got, want[t])
                props = dict((r[0], r[1]) for r in info[1:])
                assert props["grid bucket"] > 0 and props["grid points"] > 0  # diagnostics complete


def test_concurrent_churn_under_a_small_cap_stays_within_it_and_never_goes_stale(fresh_cache):
    builders, work = workload()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        serial = [evaluate(builders, c) for c in work]
    # a cap below any one frequency-severity model's distributions: caches are dropped and entries
    # evicted and rebuilt, over and over
    sizes = [e["bytes"] for e in fresh_cache.entries() if e["reference"].startswith("freqsev")]
    cap = min(sizes) // 2
    handles.CACHE.clear(reset_counts=True)
    handles.set_memory_cap(cap)
    jobs = list(range(len(work))) * 2
    np.random.default_rng(9).shuffle(jobs)

    def run(chunk):
        out = []
        for i in chunk:
            got = evaluate(builders, work[i])
            # a data model evicted between its builder and its use gives #REF!; recalculating the builder
            # cell (which evaluate() does) brings it back: try once more, as a recalculation would
            if isinstance(got, str) and got.startswith("#REF!"):
                got = evaluate(builders, work[i])
            out.append((i, got))
        return out

    with ThreadPoolExecutor(THREADS) as pool:
        results = [r for part in pool.map(run, [jobs[t::THREADS] for t in range(THREADS)]) for r in part]
    mismatches = [(work[i], out) for i, out in results if not same(out, serial[i])]
    refs = [out for _, out in mismatches if isinstance(out, str) and out.startswith("#REF!")]
    assert len(mismatches) == len(refs), mismatches[:3]  # anything not a clear #REF! is exactly right
    assert len(refs) <= len(results) // 10  # and #REF! is the rare case of an eviction in between
    entries = fresh_cache.entries()
    assert fresh_cache.nbytes == sum(e["bytes"] for e in entries)
    assert fresh_cache.nbytes <= cap or len(entries) == 1
    assert fresh_cache.evictions > 0


def test_lru_evicts_the_least_recently_used_and_a_rebuild_is_identical(fresh_cache):
    specs = [("poisson 1", "exponential 1e6"), ("poisson 2", "exponential 1e6"), ("poisson 3", "exponential 1e6")]
    refs = [F["LW_MODEL_FREQSEV"](*s) for s in specs]
    first = [F["LW_PREMIUM"](r, 1e6, 2e6, "ph 0.7") for r in refs]
    sizes = [fresh_cache.size_of(r) for r in refs]
    # touch the first: the second is now the least recently used
    F["LW_PREMIUM"](refs[0], 1e6, 2e6, "ph 0.7")
    # (1) over the cap, the least recently used model gives back its cached distributions first
    handles.set_memory_cap(sizes[0] + sizes[2] + 2 * handles.ENTRY_OVERHEAD)
    F["LW_PREMIUM"](refs[2], 1e6, 2e6, "ph 0.7")
    assert all(r in fresh_cache for r in refs)
    assert fresh_cache.size_of(refs[1]) == handles.ENTRY_OVERHEAD and fresh_cache.size_of(refs[0]) == sizes[0]
    # (2) tighter, the least recently used model is evicted; the one in use is always kept
    handles.set_memory_cap(sizes[2] + handles.ENTRY_OVERHEAD)
    F["LW_PREMIUM"](refs[2], 1e6, 2e6, "ph 0.7")
    assert [r in fresh_cache for r in refs] == [True, False, True]
    assert fresh_cache.nbytes <= fresh_cache.cap
    # evicted or trimmed, every model gives its number again, identical to before
    handles.set_memory_cap(1)
    again = [F["LW_PREMIUM"](r, 1e6, 2e6, "ph 0.7") for r in refs]
    assert again == first
    direct = [float(lw.price_layers(lw.FrequencySeverity(lw.poisson(k), lw.exponential(1e6)),
                                    [lw.Layer.occurrence(1e6, 2e6)], lw.ProportionalHazard(0.7))["premium"].iloc[0])
              for k in (1, 2, 3)]
    assert again == direct
    assert sum(handles.build_count(r) for r in refs) > 3  # they really were rebuilt


def test_the_cap_is_documented_and_reported(fresh_cache):
    assert handles.DEFAULT_CAP_BYTES == 1 << 30
    assert "LAYERWISE_CACHE_MB" in handles.__doc__ and "1 GiB" in handles.__doc__
    handles.set_memory_cap(123456789)
    table = F["LW_CACHE_INFO"]()
    assert table[0] == ["reference", "bytes", "builds"] and table[1] == ["(cap)", 123456789.0, ""]
    ref = F["LW_MODEL_FREQSEV"]("poisson 2", "lognormal 1e6 1.5")
    F["LW_PREMIUM"](ref, 0.0, 1e6, "wang 0.3")
    table = F["LW_CACHE_INFO"]()
    assert table[2][1] == float(fresh_cache.nbytes) > 0 and any(r[0] == ref for r in table[3:])
    with pytest.raises(ValueError):
        handles.set_memory_cap(-1)


def test_diagnostics_read_from_many_threads_at_once_are_complete():
    """Lazily computed diagnostics are merged once; concurrent first reads all see every entry."""
    old = sys.getswitchinterval()
    sys.setswitchinterval(1e-6)
    try:
        for trial in range(12):
            model = lw.FrequencySeverity(lw.poisson(2), lw.gamma(mean=1e6, cv=0.8))
            u = model.annual(5e5, 1e6 + trial * 1e5)
            barrier = threading.Barrier(THREADS)
            seen = []

            def read():
                barrier.wait()
                d = u.diagnostics
                seen.append((d.get("bucket"), d.get("severity_mean_grid"), d.get("severity_mean"), len(d)))
                seen.append(len(d.copy()))

            threads = [threading.Thread(target=read) for _ in range(THREADS)]
            for t in threads:
                t.start()
            for t in threads:
                t.join()
            full = len(dict(u.diagnostics))
            for s in seen:
                if isinstance(s, tuple):
                    assert None not in s[:3] and s[3] == full, s
                else:
                    assert s == full
    finally:
        sys.setswitchinterval(old)


def test_measuring_a_model_while_another_thread_adds_to_it():
    """The cache measures a model (its arrays) while another thread pricing on it keeps new attributes
    (grid plans, the last discretised severity): measuring must not fail on the attributes changing."""
    model = lw.FrequencySeverity(lw.poisson(2.0), lw.lognormal(mean=1e5, cv=1.0))
    for k in range(50):
        object.__setattr__(model, f"_array{k}", np.zeros(3))
    stop = threading.Event()

    def churn():
        k = 0
        while not stop.is_set():
            object.__setattr__(model, f"_kept{k % 200}", None)
            model.__dict__.pop(f"_kept{(k + 100) % 200}", None)
            k += 1

    worker = threading.Thread(target=churn)
    worker.start()
    try:
        sizes = {handles._measure(model) for _ in range(20000)}  # raised "dictionary changed size" before
    finally:
        stop.set()
        worker.join()
    assert sizes == {handles._measure(model)}  # the arrays measured never change
