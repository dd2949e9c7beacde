"""References to distortions, distributions and loss models, passed between cells as text.

A builder cell (LW_DISTORTION, LW_SEVERITY, LW_MODEL_YEARLOSS, ...) returns a
*reference*: a short text that other cells pass to pricing functions. A
reference depends only on content, so the same inputs always give the same
reference, and a reference can never point at a different object than the one
its inputs describe.

Reference formats
-----------------
Cheap objects are referred to by a canonical *spec text* that says everything
about them and is parsed back on use, so it never goes stale:

====================  =====================================================================
distortion            ``wang(lam=0.4)``, ``proportional_hazard(r=0.8)``, ``dual_power(m=1.5)``,
                      ``tvar(p=0.99)``, ``cost_of_capital(roe=0.1)``,
                      ``blend(0.5*wang(lam=0.4), 0.5*tvar(p=0.9))``,
                      ``table(s=[0, 0.2, 1], g=[0, 0.5, 1])`` (``, concave=false`` when allowed)
severity              ``lognormal(mean=2000000, cv=2.5)``, ``pareto(shape=1.5, scale=1000000)``,
                      ``gamma(mean=5, cv=0.5)``, ``scipy.lomax(p1=2, scale=3)``
frequency             ``poisson(mean=5)``, ``negative_binomial(mean=5, contagion=0.2)``,
                      ``binomial(n=10, q=0.1)``, ``fixed(n=3)``
frequency-severity    ``freqsev(poisson(mean=5), lognormal(mean=2000000, cv=2.5))`` with
model                 optional ``bucket=``, ``grid_length=``, ``method=`` at the end
====================  =====================================================================

Numbers are written with Python's shortest round-trip form (``repr``), so a
spec carries the full float precision. Simpler *typed forms* are accepted
wherever a spec is expected (in a cell or as a formula literal): a family name
followed by numbers, e.g. ``"wang 0.4"``, ``"ph 0.8"``, ``"tvar 99%"``,
``"lognormal 2e6 2.5"``, ``"poisson 5"``, ``"negative binomial 5 0.6"`` (mean
and cv), ``"freqsev(poisson 5, lognormal 2e6 2.5)"``; positional numbers mean
what they mean in the LW_ builder of that kind. Typed forms and specs of the
same object map to the same cached model.

Data-backed models are referred to by kind and content hash (96-bit BLAKE2b of
the input arrays): ``yearloss#<24 hex>``, ``yearevent#<24 hex>``,
``scenarios#<24 hex>``; a table distortion or blend whose spec would exceed
:data:`MAX_SPEC_LENGTH` characters becomes ``distortion#<24 hex>``. These live
only in the in-memory registry: a reference that is not there (evicted, or
built in another session) gives a ``#REF!`` error value asking to recalculate
the cell that builds it.

The model cache
---------------
Built models are held in one process-wide LRU cache, :data:`CACHE`, bounded in
memory: each entry counts the model's data and the distributions it has cached
(``cache_nbytes()``) plus :data:`ENTRY_OVERHEAD`. The cap defaults to 1 GiB
(:data:`DEFAULT_CAP_BYTES`); set it with :func:`set_memory_cap` or the
environment variable ``LAYERWISE_CACHE_MB`` (read at import). When the total
exceeds the cap, memory is given back in this order, least recently used
first within each step, so that the cheapest things to recover go first:
(1) other models' cached distributions are dropped (recomputed transparently
when needed), (2) other frequency-severity models are evicted (rebuilt
transparently from their spec text), (3) the cached distributions of the
model in use are dropped, (4) other data-backed models are evicted (their
references then give #REF! until their builder cell is recalculated). The
entry in use is never evicted, so one model larger than the cap is kept while
it is the most recent. All cache operations hold one ``RLock``; models
are built under it, so concurrent cells build a given model once. Because keys
are content, eviction can only cause a rebuild or a clear error, never a stale
number. :func:`build_count` reports how many times each model was built.
"""
from __future__ import annotations

import functools
import hashlib
import math
import os
import re
import threading
from collections import Counter, OrderedDict
from contextlib import contextmanager
from dataclasses import dataclass

import numpy as np

from layerwise.engine.distortions import (
    FAMILIES, Blend, CostOfCapital, Distortion, DualPower, ProportionalHazard, TableDistortion, TVaRDistortion,
    WangTransform,
)
from layerwise.engine.errors import InputError
from layerwise.engine.frequency import (
    Binomial, FixedCount, Frequency, NegativeBinomial, Poisson, make_frequency, negative_binomial,
)
from layerwise.engine.models import FrequencySeverity, LossModel, ScenarioTable, YearEventTable, YearLossTable
from layerwise.engine.severity import SEVERITIES, Severity, from_scipy, make_severity

from . import cells
from .cells import CellInputError, MissingReference

__all__ = [
    "CACHE", "DEFAULT_CAP_BYTES", "ENTRY_OVERHEAD", "MAX_SPEC_LENGTH", "ModelCache", "build_count",
    "set_memory_cap", "memory_cap", "distortion_spec", "distortion_reference", "severity_spec",
    "frequency_spec", "freqsev_spec", "parse_distortion", "parse_severity", "parse_frequency",
    "distortion_from", "severity_from", "frequency_from", "freqsev_reference", "data_reference",
    "resolve_model", "model_in_use", "model_kind",
]

DEFAULT_CAP_BYTES = 1 << 30  # 1 GiB
ENTRY_OVERHEAD = 1024  # nominal bytes per cache entry (object headers, spec text)
MAX_SPEC_LENGTH = 4000  # longer distortion specs are held in the registry instead
HASH_BYTES = 12  # 96-bit content hashes: 24 hex digits

DATA_KINDS = {  # reference kind -> (description, builder function)
    "yearloss": ("year loss table", "LW_MODEL_YEARLOSS"),
    "yearevent": ("year-event table", "LW_MODEL_YEAREVENT"),
    "scenarios": ("scenario table", "LW_MODEL_SCENARIOS"),
    "distortion": ("distortion", "LW_DISTORTION_TABLE or LW_DISTORTION_BLEND"),
}
_REF_RE = re.compile(r"^(?P<kind>[a-z]+)#(?P<digest>[0-9a-f]+)$")


# =========================================================================== numbers
def _num(x) -> str:
    """Shortest text that reads back as the same float; whole numbers without '.0'."""
    x = float(x)
    if math.isinf(x):
        return "inf" if x > 0 else "-inf"
    if x == math.floor(x) and abs(x) < 1e16:
        return str(int(x))
    return repr(x)


# =========================================================================== parser
@dataclass(frozen=True)
class Call:
    """A parsed spec: a (lower-case, underscore-joined) name and its arguments."""

    name: str
    args: tuple  # of (key or None, value); value: float, tuple of floats, Call, Ref or Weighted


@dataclass(frozen=True)
class Ref:
    kind: str
    digest: str

    @property
    def text(self) -> str:
        return f"{self.kind}#{self.digest}"


@dataclass(frozen=True)
class Weighted:
    weight: float
    spec: object


_TOKEN_RE = re.compile(
    r"\s*(?:"
    r"(?P<ref>[A-Za-z]+#[0-9A-Fa-f]+)"
    r"|(?P<num>[+-]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][+-]?\d+)?%?)"
    r"|(?P<word>[A-Za-z_][A-Za-z0-9_.]*)"
    r"|(?P<punct>[()\[\],=*])"
    r")"
)


def _tokens(text: str, argument: str) -> list[tuple[str, str]]:
    out, pos, s = [], 0, text.strip()
    while pos < len(s):
        m = _TOKEN_RE.match(s, pos)
        if not m or m.end() == pos:
            raise CellInputError(argument, f"cannot read {text!r} at {s[pos:pos + 12]!r}")
        kind = m.lastgroup
        out.append((kind, m.group(kind)))
        pos = m.end()
        while pos < len(s) and s[pos].isspace():
            pos += 1
    return out


def _to_float(tok: str) -> float:
    if tok.endswith("%"):
        return float(tok[:-1]) / 100.0
    return float(tok)


class _Parser:
    def __init__(self, text: str, argument: str):
        self.text, self.argument = text, argument
        self.toks = _tokens(text, argument)
        self.i = 0

    def fail(self, what: str):
        raise CellInputError(self.argument, f"cannot read {self.text!r}: {what}")

    def peek(self, k: int = 0):
        j = self.i + k
        return self.toks[j] if j < len(self.toks) else (None, None)

    def take(self, kind=None, value=None):
        tok = self.peek()
        if tok[0] is None or (kind and tok[0] != kind) or (value and tok[1] != value):
            self.fail(f"expected {value or kind}, found {tok[1] or 'the end'}")
        self.i += 1
        return tok[1]

    def parse(self):
        spec = self.spec()
        if self.peek()[0] is not None:
            self.fail(f"unexpected {self.peek()[1]!r}")
        return spec

    def spec(self):
        kind, tok = self.peek()
        if kind == "ref":
            self.i += 1
            k, d = tok.split("#", 1)
            return Ref(k.lower(), d.lower())
        if kind != "word":
            self.fail(f"expected a name, found {tok or 'the end'}")
        words = []
        while self.peek()[0] == "word" and self.peek(1) != ("punct", "="):
            words.append(self.take("word"))
        name = "_".join(w.lower() for w in words)
        args = []
        if self.peek() == ("punct", "("):
            self.take("punct", "(")
            if self.peek() != ("punct", ")"):
                while True:
                    args.append(self.arg())
                    if self.peek() == ("punct", ","):
                        self.take()
                        continue
                    break
            self.take("punct", ")")
        else:  # typed form: name followed by numbers
            while self.peek()[0] == "num":
                args.append((None, _to_float(self.take("num"))))
        return Call(name, tuple(args))

    def arg(self):
        kind, tok = self.peek()
        if kind == "word" and self.peek(1) == ("punct", "="):
            self.i += 2
            return (tok.lower(), self.value())
        if kind == "num" and self.peek(1) == ("punct", "*"):
            self.i += 2
            return (None, Weighted(_to_float(tok), self.spec()))
        return (None, self.value())

    def value(self):
        kind, tok = self.peek()
        if kind == "num":
            self.i += 1
            return _to_float(tok)
        if (kind, tok) == ("punct", "["):
            self.take()
            vals = []
            if self.peek() != ("punct", "]"):
                while True:
                    vals.append(_to_float(self.take("num")))
                    if self.peek() == ("punct", ","):
                        self.take()
                        continue
                    break
            self.take("punct", "]")
            return tuple(vals)
        return self.spec()


def _parse(text: str, argument: str):
    return _Parser(text, argument).parse()


def _number(v, argument: str, what: str) -> float:
    if isinstance(v, float):
        return v
    if isinstance(v, Call) and not v.args and v.name in ("inf", "infinity", "unlimited"):
        return math.inf
    raise CellInputError(argument, f"{what} must be a number")


def _word(v, argument: str, what: str) -> str:
    if isinstance(v, Call) and not v.args:
        return v.name
    raise CellInputError(argument, f"{what} must be a word")


def _split(call: Call, argument: str):
    pos = [v for k, v in call.args if k is None]
    kw = {}
    for k, v in call.args:
        if k is not None:
            if k in kw:
                raise CellInputError(argument, f"{call.name}: {k} is given twice")
            kw[k] = v
    return pos, kw


@contextmanager
def _blame(argument: str | None):
    """Report engine InputErrors under the cell argument, keeping the engine's parameter name."""
    if argument is None:
        yield
        return
    try:
        yield
    except CellInputError:
        raise
    except InputError as exc:
        detail = exc.message if exc.argument == argument else f"{exc.argument}: {exc.message}"
        raise CellInputError(argument, detail) from None


# =========================================================================== distortions
def distortion_spec(g: Distortion) -> str:
    """Canonical spec text of a distortion (parses back to an equal distortion)."""
    if isinstance(g, Blend):
        parts = ", ".join(f"{_num(w)}*{distortion_spec(c)}" for w, c in zip(g.weights, g.components))
        return f"blend({parts})"
    if isinstance(g, TableDistortion):
        s = ", ".join(map(_num, g.s))
        v = ", ".join(map(_num, g.g))
        extra = "" if g.require_concave else ", concave=false"
        return f"table(s=[{s}], g=[{v}]{extra})"
    if g.parameter is not None and type(g) in _CANONICAL_FAMILY:
        return f"{g.family}({g.parameter}={_num(g.value)})"
    raise CellInputError("distortion", f"no reference format for {g!r}")


_CANONICAL_FAMILY = {ProportionalHazard, WangTransform, DualPower, TVaRDistortion, CostOfCapital}


def distortion_reference(g: Distortion) -> str:
    """The reference a builder cell shows: the spec, or a registry handle when the spec is too long."""
    spec = distortion_spec(g)
    if len(spec) <= MAX_SPEC_LENGTH:
        return spec
    ref = f"distortion#{_digest_text(spec)}"
    CACHE.get_or_build(ref, lambda: g, rebuildable=False)
    return ref


def _family_names() -> str:
    return ", ".join(sorted({c.family for c in FAMILIES.values()}) + ["blend", "table"])


def _distortion(tree, argument: str) -> Distortion:
    if isinstance(tree, Ref):
        if tree.kind != "distortion":
            raise CellInputError(argument, f"{tree.text} is a {tree.kind} reference, not a distortion")
        return CACHE.lookup(tree.text, argument)
    if not isinstance(tree, Call):
        raise CellInputError(argument, "expected a distortion")
    name = tree.name
    pos, kw = _split(tree, argument)
    if name in FAMILIES:
        cls = FAMILIES[name]
        if len(tree.args) != 1 or (kw and set(kw) != {cls.parameter}):
            raise CellInputError(argument, f"{cls.family} takes one parameter, {cls.parameter}, e.g. '{cls.family}({cls.parameter}=...)'")
        value = _number(tree.args[0][1], argument, f"{cls.family} {cls.parameter}")
        with _blame(argument):
            return cls(value)
    if name == "blend":
        if kw or not pos or not all(isinstance(v, Weighted) for v in pos):
            raise CellInputError(argument, "a blend is written blend(w1*distortion1, w2*distortion2, ...)")
        comps = tuple(_distortion(v.spec, argument) for v in pos)
        with _blame(argument):
            return Blend(comps, tuple(v.weight for v in pos))
    if name == "table":
        unknown = set(kw) - {"s", "g", "concave"}
        if pos or unknown or not {"s", "g"} <= set(kw):
            raise CellInputError(argument, "a table distortion is written table(s=[0, ..., 1], g=[0, ..., 1])")
        if not isinstance(kw["s"], tuple) or not isinstance(kw["g"], tuple):
            raise CellInputError(argument, "table s and g must be lists of numbers in [ ]")
        concave = True
        if "concave" in kw:
            word = _word(kw["concave"], argument, "concave")
            if word not in ("true", "false"):
                raise CellInputError(argument, "concave must be true or false")
            concave = word == "true"
        with _blame(argument):
            return TableDistortion(kw["s"], kw["g"], concave)
    raise CellInputError(argument, f"unknown distortion {name!r}; choose one of {_family_names()}")


@functools.lru_cache(maxsize=4096)
def _distortion_cached(text: str, argument: str) -> Distortion:
    return _distortion(_parse(text, argument), argument)


def parse_distortion(text: str, argument: str = "distortion") -> Distortion:
    """Distortion from a spec, typed form or registry reference."""
    if "#" in text:  # registry references are looked up every time (never cached here)
        return _distortion(_parse(text, argument), argument)
    return _distortion_cached(text.strip(), argument)


def distortion_from(value, argument: str = "distortion") -> Distortion:
    """Distortion from a cell value (reference text or typed form)."""
    return parse_distortion(cells.text(value, argument), argument)


# =========================================================================== severities
def severity_spec(sev: Severity) -> str:
    inner = ", ".join(f"{k}={_num(v)}" for k, v in sev.params)
    return f"{sev.name}({inner})"


def _is_scipy_continuous(name: str) -> bool:
    from scipy import stats

    return isinstance(getattr(stats, name, None), stats.rv_continuous)


_SEVERITY_NAMES = ", ".join(sorted(SEVERITIES)) + ", or scipy.<name> for any continuous scipy.stats distribution"


def _severity(tree, argument: str) -> Severity:
    if not isinstance(tree, Call):
        raise CellInputError(argument, "expected a severity distribution, e.g. 'lognormal(mean=2e6, cv=2.5)'")
    pos, kw = _split(tree, argument)
    pos = [_number(v, argument, "a severity parameter") for v in pos]
    kw = {k: _number(v, argument, k) for k, v in kw.items()}
    name = tree.name
    if not name.startswith("scipy.") and name not in SEVERITIES and not _is_scipy_continuous(name):
        raise CellInputError(argument, f"unknown severity {name!r}; choose {_SEVERITY_NAMES}")
    with _blame(argument):
        if name.startswith("scipy."):
            shape = [kw.pop(k) for k in sorted((k for k in kw if re.fullmatch(r"p\d+", k)), key=lambda k: int(k[1:]))]
            return from_scipy(name[len("scipy."):], *pos, *shape, **kw)
        if kw:
            if pos:
                raise CellInputError(argument, f"{name}: give parameters all by name or all by position")
            ctor = SEVERITIES.get(name)
            if ctor is None:
                return from_scipy(name, **kw)
            try:
                return ctor(**kw)
            except TypeError:
                raise CellInputError(argument, f"{name} does not take parameters {', '.join(kw)}") from None
        return make_severity(name, *pos)


@functools.lru_cache(maxsize=4096)
def parse_severity(text: str, argument: str = "severity") -> Severity:
    """Severity from a spec or typed form."""
    return _severity(_parse(text, argument), argument)


def severity_from(value, argument: str = "severity") -> Severity:
    return parse_severity(cells.text(value, argument).strip(), argument)


# =========================================================================== frequencies
def frequency_spec(freq: Frequency) -> str:
    if isinstance(freq, Poisson):
        return f"poisson(mean={_num(freq.mean)})"
    if isinstance(freq, NegativeBinomial):
        return f"negative_binomial(mean={_num(freq.mean)}, contagion={_num(freq.contagion)})"
    if isinstance(freq, Binomial):
        return f"binomial(n={_num(freq.n)}, q={_num(freq.q)})"
    if isinstance(freq, FixedCount):
        return f"fixed(n={_num(freq.n)})"
    raise CellInputError("frequency", f"no reference format for {freq!r}")


_FREQ_KEYWORDS = {
    "poisson": ({"mean"}, lambda kw: Poisson(kw["mean"])),
    "negative_binomial": (None, None),
    "negbin": (None, None),
    "binomial": ({"n", "q"}, lambda kw: Binomial(kw["n"], kw["q"])),
    "fixed": ({"n"}, lambda kw: FixedCount(kw["n"])),
    "fixed_count": ({"n"}, lambda kw: FixedCount(kw["n"])),
}


def _frequency(tree, argument: str) -> Frequency:
    if not isinstance(tree, Call):
        raise CellInputError(argument, "expected a frequency distribution, e.g. 'poisson(mean=5)'")
    pos, kw = _split(tree, argument)
    pos = [_number(v, argument, "a frequency parameter") for v in pos]
    kw = {k: _number(v, argument, k) for k, v in kw.items()}
    name = tree.name
    with _blame(argument):
        if not kw:
            return make_frequency(name, *pos)
        if pos:
            raise CellInputError(argument, f"{name}: give parameters all by name or all by position")
        if name not in _FREQ_KEYWORDS:
            return make_frequency(name)  # raises: unknown frequency
        keys, ctor = _FREQ_KEYWORDS[name]
        if keys is None:  # negative binomial: mean with contagion or cv
            if set(kw) == {"mean", "contagion"}:
                return NegativeBinomial(kw["mean"], kw["contagion"])
            if set(kw) == {"mean", "cv"}:
                return negative_binomial(kw["mean"], kw["cv"])
            raise CellInputError(argument, "negative_binomial takes mean with cv or with contagion")
        if set(kw) != keys:
            raise CellInputError(argument, f"{name} takes {', '.join(sorted(keys))}")
        return ctor(kw)


@functools.lru_cache(maxsize=4096)
def parse_frequency(text: str, argument: str = "frequency") -> Frequency:
    """Frequency from a spec or typed form."""
    return _frequency(_parse(text, argument), argument)


def frequency_from(value, argument: str = "frequency") -> Frequency:
    return parse_frequency(cells.text(value, argument).strip(), argument)


# =========================================================================== frequency-severity models
def freqsev_spec(freq: Frequency, sev: Severity, bucket=None, grid_length=None, method="moment") -> str:
    parts = [frequency_spec(freq), severity_spec(sev)]
    if bucket is not None:
        parts.append(f"bucket={_num(bucket)}")
    if grid_length is not None:
        parts.append(f"grid_length={_num(grid_length)}")
    if method and method != "moment":
        parts.append(f"method={method}")
    return f"freqsev({', '.join(parts)})"


@dataclass(frozen=True)
class _FreqSevRecipe:
    spec: str
    frequency: Frequency
    severity: Severity
    bucket: float | None
    grid_length: int | None
    method: str

    def build(self) -> FrequencySeverity:
        return FrequencySeverity(self.frequency, self.severity, self.bucket, self.grid_length, self.method)


def _freqsev_recipe(tree: Call, argument: str) -> _FreqSevRecipe:
    pos, kw = _split(tree, argument)
    if len(pos) != 2:
        raise CellInputError(argument, "a frequency-severity model is written freqsev(frequency, severity[, bucket=..., grid_length=..., method=...])")
    unknown = set(kw) - {"bucket", "grid_length", "method"}
    if unknown:
        raise CellInputError(argument, f"freqsev does not take {', '.join(sorted(unknown))}")
    freq = _frequency(pos[0], argument)
    sev = _severity(pos[1], argument)
    bucket = _number(kw["bucket"], argument, "bucket") if "bucket" in kw else None
    grid = _number(kw["grid_length"], argument, "grid_length") if "grid_length" in kw else None
    if grid is not None and grid != math.floor(grid):
        raise CellInputError(argument, "grid_length must be a whole number")
    grid = int(grid) if grid is not None else None
    method = _word(kw["method"], argument, "method") if "method" in kw else "moment"
    return _FreqSevRecipe(freqsev_spec(freq, sev, bucket, grid, method), freq, sev, bucket, grid, method)


@functools.lru_cache(maxsize=4096)
def _model_text(text: str, argument: str) -> _FreqSevRecipe:
    tree = _parse(text, argument)
    if not isinstance(tree, Call) or tree.name != "freqsev":
        raise CellInputError(argument, _not_a_model(text))
    return _freqsev_recipe(tree, argument)


def freqsev_reference(freq, sev, bucket=None, grid_length=None, method="moment", argument="model") -> str:
    """Build (or find) a frequency-severity model and return its spec reference."""
    spec = freqsev_spec(freq, sev, bucket, grid_length, method)
    recipe = _FreqSevRecipe(spec, freq, sev, bucket, grid_length, method)
    with _blame(argument):
        CACHE.get_or_build(spec, recipe.build, rebuildable=True)
    return spec


def _not_a_model(text: str) -> str:
    short = text if len(text) <= 60 else text[:57] + "..."
    return (f"expected a model reference from LW_MODEL_FREQSEV, LW_MODEL_YEARLOSS, LW_MODEL_YEAREVENT "
            f"or LW_MODEL_SCENARIOS, got {short!r}")


# =========================================================================== data-backed models
def _digest_text(text: str) -> str:
    return hashlib.blake2b(text.encode("utf-8"), digest_size=HASH_BYTES).hexdigest()


def data_reference(kind: str, arrays, build, extra: str = "") -> str:
    """Reference ``kind#hash`` of the arrays (and ``extra``); builds and registers the model if new."""
    h = hashlib.blake2b(digest_size=HASH_BYTES)
    h.update(kind.encode())
    h.update(b"|" + extra.encode())
    for arr in arrays:
        if arr is None:
            h.update(b"|none")
            continue
        a = np.ascontiguousarray(arr, dtype=np.float64)
        h.update(f"|{a.size}|".encode())
        h.update(a.view(np.uint8))
    ref = f"{kind}#{h.hexdigest()}"
    CACHE.get_or_build(ref, build, rebuildable=False)
    return ref


# =========================================================================== resolving model arguments
def model_kind(model: LossModel) -> str:
    return {
        FrequencySeverity: "frequency-severity model",
        YearLossTable: "year loss table",
        YearEventTable: "year-event table",
        ScenarioTable: "scenario table",
    }.get(type(model), type(model).__name__)


def resolve_model(value, argument: str = "model") -> tuple[str, LossModel]:
    """(cache key, model) for a model reference in a cell; rebuilds a frequency-severity model if evicted."""
    t = cells.text(value, argument)
    m = _REF_RE.match(t.strip().lower())
    if m:
        kind = m["kind"]
        if kind not in DATA_KINDS or kind == "distortion":
            raise CellInputError(argument, _not_a_model(t))
        ref = m.group(0)
        return ref, CACHE.lookup(ref, argument)
    recipe = _model_text(t.strip(), argument)
    with _blame(argument):
        model = CACHE.get_or_build(recipe.spec, recipe.build, rebuildable=True)
    return recipe.spec, model


@contextmanager
def model_in_use(value, argument: str = "model"):
    """Resolve a model argument; afterwards re-measure its memory and keep the cache within its cap."""
    ref, model = resolve_model(value, argument)
    try:
        yield ref, model
    finally:
        CACHE.account(ref)


# =========================================================================== the cache
def _measure(obj) -> int:
    n = ENTRY_OVERHEAD
    if isinstance(obj, LossModel):
        n += int(obj.cache_nbytes())
        if not hasattr(obj, "_data_nbytes"):
            # a snapshot first (one C-level copy, atomic under the GIL): another thread pricing on the model
            # may add its lazily kept attributes (grid plans, the last discretised severity) meanwhile
            n += sum(int(v.nbytes) for v in tuple(vars(obj).values()) if isinstance(v, np.ndarray))
    elif isinstance(obj, TableDistortion):
        n += 16 * len(obj.s) * 2
    return n


@dataclass
class _Entry:
    obj: object
    rebuildable: bool
    nbytes: int


class ModelCache:
    """Thread-safe LRU registry of built models, bounded by memory (see module docstring)."""

    def __init__(self, cap_bytes: int = DEFAULT_CAP_BYTES):
        self._lock = threading.RLock()
        self._entries: OrderedDict[str, _Entry] = OrderedDict()
        self._builds: Counter = Counter()
        self._evictions = 0
        self._total = 0
        self._cap = int(cap_bytes)

    # -- configuration -----------------------------------------------------
    @property
    def cap(self) -> int:
        return self._cap

    def set_cap(self, nbytes: int) -> int:
        """Set the memory cap in bytes (takes effect at once); returns the previous cap."""
        nbytes = int(nbytes)
        if nbytes < 0:
            raise ValueError("the cache cap must be >= 0 bytes")
        with self._lock:
            old, self._cap = self._cap, nbytes
            self._enforce(keep=None)
        return old

    # -- use ---------------------------------------------------------------
    def get_or_build(self, ref: str, build, *, rebuildable: bool):
        """The object for ``ref``, building (and counting) it when it is not held."""
        with self._lock:
            e = self._entries.get(ref)
            if e is not None:
                self._entries.move_to_end(ref)
                return e.obj
            obj = build()
            self._builds[ref] += 1
            e = _Entry(obj, rebuildable, _measure(obj))
            self._entries[ref] = e
            self._total += e.nbytes
            self._enforce(keep=ref)
            return obj

    def lookup(self, ref: str, argument: str = "model"):
        """The object held for a data-backed reference, or a #REF! MissingReference error."""
        with self._lock:
            e = self._entries.get(ref)
            if e is not None:
                self._entries.move_to_end(ref)
                return e.obj
        kind = ref.split("#", 1)[0]
        what, builder = DATA_KINDS.get(kind, ("model", "the LW_MODEL_ function"))
        raise MissingReference(
            argument,
            f"{what} {ref} is not in memory (cache trimmed, or built in another session); "
            f"recalculate the cell that builds it with {builder}",
        )

    def account(self, ref: str):
        """Re-measure ``ref`` after use (its model may have cached new distributions) and enforce the cap."""
        with self._lock:
            e = self._entries.get(ref)
            if e is None:
                return
            n = _measure(e.obj)
            self._total += n - e.nbytes
            e.nbytes = n
            self._enforce(keep=ref)

    def _enforce(self, keep):
        """Give memory back until within the cap, cheapest to recover first (see the module docstring)."""
        if self._total <= self._cap:
            return
        # 1. least recently used first: drop other models' cached distributions (recomputed on demand)
        for ref, e in list(self._entries.items()):
            if self._total <= self._cap:
                return
            if ref != keep:
                self._shrink(e)
        # 2. evict other rebuildable entries (rebuilt from their spec text on demand)
        self._evict(keep, rebuildable=True)
        # 3. drop the cached distributions of the entry in use
        if self._total > self._cap and keep in self._entries:
            self._shrink(self._entries[keep])
        # 4. only then evict data-backed entries (their references give #REF! until rebuilt)
        self._evict(keep, rebuildable=False)

    def _shrink(self, e: _Entry):
        if isinstance(e.obj, LossModel) and e.nbytes > ENTRY_OVERHEAD:
            e.obj.clear_cache()
            n = _measure(e.obj)
            self._total += n - e.nbytes
            e.nbytes = n

    def _evict(self, keep, *, rebuildable: bool):
        for ref, e in list(self._entries.items()):
            if self._total <= self._cap:
                return
            if ref != keep and e.rebuildable == rebuildable:
                del self._entries[ref]
                self._total -= e.nbytes
                self._evictions += 1

    # -- inspection ----------------------------------------------------------
    def __contains__(self, ref: str) -> bool:
        with self._lock:
            return ref in self._entries

    def __len__(self) -> int:
        with self._lock:
            return len(self._entries)

    @property
    def nbytes(self) -> int:
        with self._lock:
            return self._total

    @property
    def evictions(self) -> int:
        return self._evictions

    def size_of(self, ref: str) -> int:
        """Bytes counted for ``ref`` (0 when not held)."""
        with self._lock:
            e = self._entries.get(ref)
            return e.nbytes if e is not None else 0

    def build_count(self, ref: str | None = None):
        """Builds of one reference, or a dict of all references' build counts."""
        with self._lock:
            return self._builds[ref] if ref is not None else dict(self._builds)

    def entries(self) -> list[dict]:
        with self._lock:
            return [
                {"reference": ref, "bytes": e.nbytes, "rebuildable": e.rebuildable, "builds": self._builds[ref]}
                for ref, e in self._entries.items()
            ]

    def clear(self, *, reset_counts: bool = False):
        """Forget every entry (and optionally the build counts)."""
        with self._lock:
            self._entries.clear()
            self._total = 0
            if reset_counts:
                self._builds.clear()
                self._evictions = 0


def _cap_from_env() -> int:
    raw = os.environ.get("LAYERWISE_CACHE_MB")
    if raw:
        try:
            mb = float(raw)
            if mb >= 0 and math.isfinite(mb):
                return int(mb * (1 << 20))
        except ValueError:
            pass
    return DEFAULT_CAP_BYTES


CACHE = ModelCache(_cap_from_env())


def set_memory_cap(nbytes: int) -> int:
    """Set the process-wide cache cap in bytes; returns the previous one."""
    return CACHE.set_cap(nbytes)


def memory_cap() -> int:
    return CACHE.cap


def build_count(ref: str | None = None):
    """How many times the model behind ``ref`` was built (all counts as a dict without ``ref``)."""
    return CACHE.build_count(ref)
