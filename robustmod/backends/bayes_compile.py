"""nutpie's compiled functions of a PyMC model, kept on disk so a new process need not compile again.

nutpie samples a PyMC model through two C callbacks compiled with numba: the log density with its
gradient, and the expansion of a draw into every traced variable. Numba compiles them in each
process (several seconds): nutpie defines them as closures over numba dispatchers, whose pickled
identity differs per process, so numba's own cache never finds them again. Here the same two
callbacks — the same source as nutpie's, calling the same PyTensor-generated functions — are
defined without closures and cached with numba's cache machinery under a key of everything
compiled into them:

- PyTensor's cache keys of the two generated functions (the model's graph, its constants and the
  static types of the shared data: a model of the same structure on other data of the same
  columns shares them);
- the number of parameters and traced values, the layout of the shared data;
- the callbacks' source and the versions of nutpie, numba, llvmlite, PyTensor, PyMC and numpy
  (numba adds the Python version and the CPU).

The files live in ``robustmod.cachedir.cache_dir("numba")`` and are written by numba atomically
(a temporary file, then a rename). The functions are the ones nutpie would compile, so the draws
for a given seed are bit-identical (tests/test_bayes_compile.py). When the cache is off or the
installed nutpie lacks a helper used here, nutpie compiles as usual.
"""
from __future__ import annotations

import hashlib
import warnings
import weakref
from collections.abc import Callable
from importlib.metadata import PackageNotFoundError, version
from pathlib import Path
from typing import Any

import numpy as np

from ..cachedir import cache_dir

#: The log-density callback, as in nutpie (``_make_c_logp_func``) but with its values as globals.
LOGP_SOURCE = '''
def robustmod_logp(dim, x_, out_, logp_, user_data_):
    if dim != n_dim:
        return -1
    try:
        x = numba.carray(x_, (n_dim,))
        out = numba.carray(out_, (n_dim,))
        logp = numba.carray(logp_, ())
        logp_val, grad = extract(x, user_data_)
        logp[()] = logp_val
        out[...] = grad
        if not np.all(np.isfinite(out)):
            return 3
        if not np.isfinite(logp_val):
            return 4
    except Exception:
        return 1
    return 0
'''
#: The expansion callback, as in nutpie (``_make_c_expand_func``).
EXPAND_SOURCE = '''
def robustmod_expand(dim, expanded, x_, out_, user_data_):
    if dim != n_dim:
        return -1
    if expanded != n_expanded:
        return -1
    try:
        x = numba.carray(x_, (n_dim,))
        out = numba.carray(out_, (n_expanded,))
        (values,) = extract(x, user_data_)
        out[...] = values
    except Exception:
        return -2
    return 0
'''
VERSIONED = ("nutpie", "numba", "llvmlite", "pytensor", "pymc", "numpy")

#: Functions defined here → (cache key, folder); read by the numba cache locator below.
_KEYED: weakref.WeakKeyDictionary[Callable[..., Any], tuple[str, Path]] = weakref.WeakKeyDictionary()
_LOCATOR_ADDED = False


def _versions() -> str:
    out = []
    for name in VERSIONED:
        try:
            out.append(f"{name}={version(name)}")
        except PackageNotFoundError:
            out.append(f"{name}=?")
    return ",".join(out)


def _add_locator() -> None:
    """Teach numba where the functions defined here are cached (once per process)."""
    global _LOCATOR_ADDED  # noqa: PLW0603 - one registration per process
    if _LOCATOR_ADDED:
        return
    from numba.core.caching import CacheImpl, _CacheLocator  # noqa: PLC0415

    class KeyedLocator(_CacheLocator):
        """Our folder, our key as the disambiguator; freshness is part of the key (no source stamp)."""

        def __init__(self, key: str, folder: Path) -> None:
            self._key, self._folder = key, folder

        def ensure_cache_path(self) -> None:  # cache_dir() created and checked it
            pass

        def get_cache_path(self) -> str:
            return str(self._folder)

        def get_source_stamp(self) -> int:
            return 0

        def get_disambiguator(self) -> str:
            return self._key

        @classmethod
        def from_function(cls, py_func: Any, py_file: str) -> KeyedLocator | None:
            entry = _KEYED.get(py_func)
            return None if entry is None else cls(*entry)

    CacheImpl._locator_classes.insert(0, KeyedLocator)
    _LOCATOR_ADDED = True


def _define(source: str, name: str, key: str, folder: Path, env: dict[str, Any]) -> Callable[..., Any]:
    """The function ``name`` of ``source`` with ``env`` as its globals, registered under ``key``."""
    # numba rebuilds a cached function's environment from the module named here.
    scope: dict[str, Any] = {"__name__": __name__, **env}
    # Our own constant source: numba needs a plain function whose values are globals, not closures.
    exec(compile(source, "<robustmod>", "exec"), scope)
    fn: Callable[..., Any] = scope[name]
    _KEYED[fn] = (key, folder)
    return fn


def compile_pymc_model(model: Any) -> Any:
    """``nutpie.compile_pymc_model(model, backend="numba", freeze_model=False)``, with the two numba
    callbacks loaded from the on-disk cache when an earlier process compiled them."""
    import nutpie  # noqa: PLC0415

    folder = cache_dir("numba")
    if folder is None:
        return nutpie.compile_pymc_model(model, backend="numba", freeze_model=False)
    try:
        return _compile_cached(model, folder)
    except (ImportError, AttributeError, TypeError):  # an installed nutpie without these helpers
        return nutpie.compile_pymc_model(model, backend="numba", freeze_model=False)


def _compile_cached(model: Any, folder: Path) -> Any:
    """nutpie's ``_compile_pymc_model_numba`` step by step, with closure-free, keyed callbacks."""
    import numba  # noqa: PLC0415
    from nutpie import compile_pymc as ncp  # noqa: PLC0415
    from pymc.initial_point import make_initial_point_fn  # noqa: PLC0415
    from pytensor.link.numba.cache import CACHED_SRC_FUNCTIONS  # noqa: PLC0415

    # The same initial points as nutpie's default (support point, jittered on every free variable).
    initial = ncp._wrap_with_lock(make_initial_point_fn(model=model, overrides=None, default_strategy="support_point",
                                                        jitter_rvs=set(model.free_RVs), return_transformed=True))
    n_dim, n_expanded, logp_pt, expand_pt, initial_point_fn, shape_info = ncp._make_functions(
        model, mode="NUMBA", compute_grad=True, join_expanded=True, pymc_initial_point_fn=initial, var_names=None)
    logp_fn, expand_fn = logp_pt.vm.jit_fn, expand_pt.vm.jit_fn
    graph_keys = (CACHED_SRC_FUNCTIONS.get(logp_fn.py_func), CACHED_SRC_FUNCTIONS.get(expand_fn.py_func))
    if None in graph_keys:  # PyTensor could not key a graph: nothing safe to cache under
        import nutpie  # noqa: PLC0415

        return nutpie.compile_pymc_model(model, backend="numba", freeze_model=False)
    shared_data: dict[str, np.ndarray] = {}
    shared_vars: dict[str, Any] = {}
    for var in [*logp_pt.get_shared(), *expand_pt.get_shared()]:
        if var.name in shared_data and shared_vars[var.name] is not var:
            raise ValueError(f"Shared variables must have unique names: {var.name}")
        shared_data[var.name] = np.array(var.get_value(), order="C", copy=True)
        shared_vars[var.name] = var
    for value in shared_data.values():
        value.flags.writeable = False
    user_data = ncp.make_user_data(shared_vars, shared_data)
    logp_names = [v.name for v in logp_pt.get_shared()]
    expand_names = [v.name for v in expand_pt.get_shared()]
    base = repr((graph_keys, n_dim, n_expanded, user_data.dtype.descr, logp_names, expand_names, _versions()))
    _, logp_sig = ncp._make_c_logp_func(n_dim, logp_fn, user_data, logp_names, shared_data)
    _, expand_sig = ncp._make_c_expand_func(n_dim, n_expanded, expand_fn, user_data, expand_names, shared_data)
    common = {"numba": numba, "np": np, "n_dim": n_dim}
    logp_py = _define(LOGP_SOURCE, "robustmod_logp", _key("logp", base, LOGP_SOURCE), folder,
                      {**common, "extract": ncp.make_extraction_fn(logp_fn, shared_data, logp_names, user_data.dtype)})
    expand_py = _define(EXPAND_SOURCE, "robustmod_expand", _key("expand", base, EXPAND_SOURCE), folder,
                        {**common, "n_expanded": n_expanded,
                         "extract": ncp.make_extraction_fn(expand_fn, shared_data, expand_names, user_data.dtype)})
    _add_locator()
    with warnings.catch_warnings():  # as nutpie: a function numba cannot cache is compiled all the same
        warnings.filterwarnings("ignore", message="Cannot cache compiled function", category=numba.NumbaWarning)
        logp_c = numba.cfunc(logp_sig, cache=True)(logp_py)
        expand_c = numba.cfunc(expand_sig, cache=True)(expand_py)
    dims, coords = ncp._prepare_dims_and_coords(model, shape_info)
    return ncp.CompiledPyMCModel(
        _n_dim=n_dim, dims=dims, _coords=coords, _shapes={name: tuple(shape) for name, _, shape in zip(*shape_info, strict=True)},
        compiled_logp_func=logp_c, compiled_expand_func=expand_c, initial_point_func=initial_point_fn,
        shared_data=shared_data, user_data=user_data, n_expanded=n_expanded, shape_info=shape_info,
        logp_func=logp_pt, expand_func=expand_pt)


#: ArviZ's numba functions on a fit's path (the variance in its ESS, used for R-hat, ESS and PSIS-LOO's
#: relative efficiency), as (module, name). ArviZ compiles them in every process without numba's cache.
ARVIZ_JIT = (("arviz.stats.stats_utils", "stats_variance_1d"),)


def cache_arviz_jit() -> None:
    """Let numba keep ArviZ's functions of :data:`ARVIZ_JIT` in robustmod's cache folder (about 0.3 s of
    compiling per process otherwise). The compiled code is the one ArviZ would build, so every
    number is unchanged; a function already compiled in this process, or an ArviZ whose wrapper
    differs, is left as it is."""
    import importlib  # noqa: PLC0415
    import inspect  # noqa: PLC0415

    folder = cache_dir("numba")
    if folder is None:
        return
    for module_name, name in ARVIZ_JIT:
        try:
            wrapper = getattr(importlib.import_module(module_name), name)
            function, kwargs = wrapper.function, wrapper.kwargs
            source = inspect.getsource(function)
        except (ImportError, AttributeError, OSError, TypeError):
            continue
        if not isinstance(kwargs, dict) or "numba_fn" in vars(wrapper) or function in _KEYED:
            continue  # compiled already (ArviZ memoises it as an attribute), or registered
        base = repr((module_name, name, kwargs, _versions(), _version_of("arviz")))
        _KEYED[function] = (_key("arviz", base, source), folder)
        _add_locator()
        kwargs["cache"] = True


def _version_of(name: str) -> str:
    try:
        return version(name)
    except PackageNotFoundError:
        return "?"


def _key(kind: str, base: str, source: str) -> str:
    return f"{kind}-{hashlib.sha256((base + source).encode()).hexdigest()[:32]}"
