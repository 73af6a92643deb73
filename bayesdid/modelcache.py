"""A compile cache that survives processes: a compiled model is written once and loaded in about a second.

nutpie compiles a PyMC model into two numba C callbacks (the log density with its gradient, and the
function that expands a draw into every traced variable). Most of a compile is numba typing and
LLVM code generation of those two; loading their machine code back is fast. numba's own cache
cannot do it here: nutpie names the data containers of its wrappers with random keys, so their cache
key differs in every process. This module keeps its own entry per model structure instead:

    <cache>/models/<key>.model   header line, SHA-256 of the payload, pickled payload
    <cache>/models/<key>.lock    held while one process compiles that structure

The payload holds the object code of both callbacks (numba's ``serialize_using_object_code``, what
numba's own cache stores), the layout of nutpie's data record, and the names and shapes of the
sampled variables. A warm load rebuilds the PyMC model (fractions of a second), PyMC's initial-point
function and nutpie's ``CompiledPyMCModel`` around the loaded code; the draws are bit for bit those
of the process that compiled it (same machine code, same seed).

The key is the SHA-256 of everything that changes the compiled code: the versions of Python, numpy,
PyTensor, numba, llvmlite, nutpie, PyMC and bayesdid, numba's target (triple, CPU name, CPU
features), the compile flags, and a fingerprint of the model's graph (every operation, input type,
constant value and data-container name of the log density and of the traced variables). An entry of
another version or structure has another key and is never read. A damaged entry (truncated, bit
flips, unreadable) fails its checksum or its load, is reported once and rebuilt.

Several processes compiling the same structure at once (sweep or calibration workers) take the lock
file in turn: the first compiles and writes the entry (to a temporary file renamed into place), the
others wait and then load it. A cache folder that cannot be written is used read-only: entries found
are loaded, new compiles stay in the process, and one warning says why runs are slower.
"""

from __future__ import annotations

import hashlib
import json
import os
import pickle
import platform
import re
import time
from contextlib import contextmanager
from pathlib import Path

import numpy as np

from . import cachedir
from .outputs import atomic_write
from .version import __version__

__all__ = ["FORMAT", "fingerprint", "graph_fingerprint", "compile_cached", "entry_ok", "STATS", "LOG_ENV", "read_log"]

#: Bump when the entry layout or the way models are compiled changes (compile flags, nutpie wrapper).
FORMAT = 2
MAGIC = b"bayesdid compiled model\n"
#: Compiles, loads from disk and damaged entries met in this process (tests and benchmarks read it).
STATS = {"compiled": 0, "loaded": 0, "damaged": 0, "store_failed": 0}
#: Entries loaded or written by this process, by key: one set of machine code per key and process
#: (loading the same object code twice would define its symbols twice in numba's JIT).
_IN_PROCESS: dict[str, tuple] = {}

_ADDRESS = re.compile(r" at 0x[0-9a-fA-F]+")
#: When this environment variable names a file, every model this process asks for appends one JSON
#: line to it (see :func:`_log`); worker processes inherit it. The test suite sets it to find where
#: its compile time goes.
LOG_ENV = "BAYESDID_COMPILE_LOG"


def _op_description(op) -> str:
    props = getattr(op, "__props__", None)
    if props:
        desc = f"{type(op).__module__}.{type(op).__qualname__}" + repr(tuple((p, getattr(op, p)) for p in props))
    else:
        desc = f"{type(op).__module__}.{type(op).__qualname__}:{op}"
    return _ADDRESS.sub("", desc)


def _root_description(v) -> str:
    from pytensor.compile.sharedvalue import SharedVariable
    from pytensor.graph.basic import Constant

    if isinstance(v, Constant):
        data = np.asarray(v.data)
        digest = hashlib.sha256(np.ascontiguousarray(data).tobytes()).hexdigest()[:32]
        return f"const:{v.type}:{data.dtype}:{data.shape}:{digest}"
    if isinstance(v, SharedVariable):
        # Data containers: the name and the type fix the compiled code; the values are data.
        return f"shared:{v.name}:{v.type}"
    return f"input:{v.name}:{v.type}"


def graph_fingerprint(model) -> str:
    """SHA-256 of the structure of the model's log density and traced variables.

    Walks the graphs of ``model.logp()`` and of ``model.unobserved_value_vars`` (what nutpie
    compiles) in topological order and hashes each operation with its parameters, each input's
    type, each constant's value, and each data container's name and type; data values are not
    part of it (a new data set of the same structure reuses the entry).
    """
    from pytensor.graph.traversal import toposort

    outputs = [model.logp(), *model.unobserved_value_vars]
    h = hashlib.sha256()
    ids: dict = {}

    def vid(v) -> str:
        if v not in ids:
            ids[v] = _root_description(v)
        return ids[v]

    for k, node in enumerate(toposort(outputs)):
        ins = ",".join(vid(i) for i in node.inputs)
        outs = []
        for j, out in enumerate(node.outputs):
            ids[out] = f"n{k}.{j}"
            outs.append(str(out.type))
        h.update(f"{k}|{_op_description(node.op)}|{ins}|{','.join(outs)}\n".encode())
    names = [model.rvs_to_values[v].name for v in model.free_RVs] + [v.name for v in model.unobserved_value_vars]
    h.update(("outputs:" + ",".join(vid(o) for o in outputs) + "|names:" + ",".join(map(str, names))).encode())
    return h.hexdigest()


def _material(model) -> dict:
    import llvmlite
    import numba
    import nutpie
    import pymc
    import pytensor
    from numba.core.registry import cpu_target

    triple, cpu, features = cpu_target.target_context.codegen().magic_tuple()
    return {
        "format": FORMAT,
        "versions": {
            "python": platform.python_version(),
            "numpy": np.__version__,
            "pytensor": pytensor.__version__,
            "numba": numba.__version__,
            "llvmlite": llvmlite.__version__,
            "nutpie": nutpie.__version__,
            "pymc": pymc.__version__,
            "bayesdid": __version__,
        },
        "target": {"triple": triple, "cpu": cpu, "features": features},
        "flags": {
            "backend": "numba",
            "fastmath": False,
            "numba_opt": str(numba.config.OPT),
            "floatX": pytensor.config.floatX,
        },
        "graph": graph_fingerprint(model),
    }


def fingerprint(model) -> tuple[str, dict]:
    """The cache key of a model and the material it hashes."""
    material = _material(model)
    return hashlib.sha256(json.dumps(material, sort_keys=True).encode()).hexdigest(), material


# --- entries ------------------------------------------------------------------------------------


class _LoadedFunc:
    """What nutpie reads of a numba ``CFunc``: its ``address`` (and the library that owns the code)."""

    def __init__(self, library, name: str):
        self._library = library
        self.native_name = name
        self.address = library.get_pointer_to_function(name)


class _DataVar:
    """Stands for a data container in ``CompiledPyMCModel.shared_var_keys`` (nutpie reads name and ndim)."""

    def __init__(self, name: str, ndim: int):
        self.name = name
        self.ndim = ndim

    def __repr__(self):
        return f"<data {self.name}>"


def _external_symbols(library) -> list[str]:
    """Symbols the machine code of ``library`` takes from the process (numba's runtime and C helpers)."""
    mod = library._final_module
    names = {f.name for f in mod.functions if f.is_declaration}
    names |= {g.name for g in mod.global_variables if g.is_declaration}
    return sorted(n for n in names if not n.startswith("llvm."))


def _payload(compiled, material: dict) -> dict:
    keys = [(var.name, key) for var, key in compiled.shared_var_keys.items()]
    externals = set(_external_symbols(compiled.compiled_logp_func._library))
    externals |= set(_external_symbols(compiled.compiled_expand_func._library))
    return {
        "externals": sorted(externals),
        "material": material,
        "logp": compiled.compiled_logp_func._library.serialize_using_object_code(),
        "logp_name": compiled.compiled_logp_func.native_name,
        "expand": compiled.compiled_expand_func._library.serialize_using_object_code(),
        "expand_name": compiled.compiled_expand_func.native_name,
        "record_dtype": compiled.user_data.dtype,
        "data_keys": keys,
        "n_dim": compiled.n_dim,
        "n_expanded": compiled.n_expanded,
        "shape_info": compiled.shape_info,
        "reparameterized": list(compiled.reparameterized_names or []),
    }


def _write_entry(path: Path, payload: dict) -> None:
    body = pickle.dumps(payload, protocol=pickle.HIGHEST_PROTOCOL)
    # fsync before the rename: other processes load the entry, possibly after the machine crashed
    atomic_write(path, MAGIC + hashlib.sha256(body).hexdigest().encode() + b"\n" + body, fsync=True)


class DamagedEntry(Exception):
    """A cache entry that cannot be used (its reason is the message)."""


def _checked_body(raw: bytes) -> bytes:
    """The payload of an entry's bytes after its header and checksum are verified."""
    if not raw.startswith(MAGIC):
        raise DamagedEntry("it does not start with bayesdid's header")
    rest = raw[len(MAGIC) :]
    digest, sep, body = rest[:64], rest[64:65], rest[65:]
    if sep != b"\n" or hashlib.sha256(body).hexdigest().encode() != digest:
        raise DamagedEntry(f"its checksum does not match ({len(raw):,} bytes; truncated or altered)")
    return body


def entry_ok(path: Path) -> bool:
    """Whether the entry at ``path`` is whole (header and checksum); says nothing of its key."""
    try:
        _checked_body(Path(path).read_bytes())
    except (DamagedEntry, OSError):
        return False
    return True


def _read_entry(path: Path, material: dict) -> dict:
    body = _checked_body(path.read_bytes())
    try:
        payload = pickle.loads(body)
    except Exception as exc:  # noqa: BLE001 - any unpickling failure means the entry is unusable
        raise DamagedEntry(f"it cannot be read ({type(exc).__name__})") from None
    if not isinstance(payload, dict) or payload.get("material") != material:
        raise DamagedEntry("it was written for another model or version")
    return payload


def _missing_symbols(names) -> list[str]:
    import llvmlite.binding as ll

    return [n for n in names if not ll.address_of_symbol(n)]


def _functions_from(payload: dict) -> tuple:
    from numba.core.registry import cpu_target
    from numba.core.runtime import rtsys

    # Every symbol the code calls must be known to the JIT before it is added, or LLVM aborts the
    # process. Creating numba's CPU context registers its C helpers, rtsys its runtime (NRT_*); the
    # full refresh (seconds: it imports every lowering registry) only when something is still missing.
    ctx = cpu_target.target_context
    rtsys.initialize(ctx)
    if _missing_symbols(payload["externals"]):
        ctx.refresh()
        missing = _missing_symbols(payload["externals"])
        if missing:
            raise DamagedEntry(f"its code needs symbols this process does not provide ({', '.join(missing[:3])})")
    codegen = ctx.codegen()
    logp = _LoadedFunc(codegen.unserialize_library(payload["logp"]), payload["logp_name"])
    expand = _LoadedFunc(codegen.unserialize_library(payload["expand"]), payload["expand_name"])
    return logp, expand


def _assemble(model, payload: dict, functions: tuple):
    """nutpie's ``CompiledPyMCModel`` around loaded machine code, with this model's data and initial points."""
    from nutpie import compile_pymc as ncp
    from pymc.initial_point import make_initial_point_fn

    logp, expand = functions
    names, _, shapes = payload["shape_info"]
    n_free = len(model.free_RVs)
    free_names = [model.rvs_to_values[v].name for v in model.free_RVs]
    if list(names[:n_free]) != free_names:
        raise DamagedEntry("its variables do not match the model's")
    # As nutpie.compile_pymc_model does it: support points with a U(-1, 1) jitter of every free variable.
    ipf = make_initial_point_fn(
        model=model,
        overrides=None,
        default_strategy="support_point",
        jitter_rvs=set(model.free_RVs),
        return_transformed=True,
    )
    # The sizes of the free variables are baked into the machine code (nutpie's flat parameter vector).
    # A graph whose sizes all live in data containers and dims has one fingerprint for every size, so
    # check them: code for other sizes would read and write past the model's parameter vector.
    point = ipf(0)
    sizes = [tuple(np.shape(point[n])) for n in free_names]
    if sizes != [tuple(int(d) for d in s) for s in shapes[:n_free]]:
        raise DamagedEntry(
            f"it was compiled for other sizes of the model's variables ({dict(zip(free_names, sizes))} here)"
        )
    ipf = ncp._rv_dict_to_flat_array_wrapper(
        ncp._wrap_with_lock(ipf), names=list(names[:n_free]), shapes=list(shapes[:n_free])
    )
    shared, var_keys = {}, {}
    for name, key in payload["data_keys"]:
        if name not in model.named_vars:
            raise DamagedEntry(f"it reads a data container '{name}' the model does not have")
        val = np.array(model[name].get_value(), order="C", copy=True)
        val.flags.writeable = False
        shared[key] = val
        var_keys[_DataVar(name, val.ndim)] = key
    user_data = np.zeros((), dtype=payload["record_dtype"])
    ncp.update_user_data(user_data, shared)
    dims, coords = ncp._prepare_dims_and_coords(model, payload["shape_info"], payload["reparameterized"])
    return ncp.CompiledPyMCModel(
        _n_dim=payload["n_dim"],
        dims=dims,
        _coords=coords,
        _shapes={n: tuple(s) for n, _, s in zip(*payload["shape_info"])},
        compiled_logp_func=logp,
        compiled_expand_func=expand,
        initial_point_func=ipf,
        shared_data=shared,
        shared_var_keys=var_keys,
        user_data=user_data,
        n_expanded=payload["n_expanded"],
        shape_info=payload["shape_info"],
        logp_func=None,
        expand_func=None,
        reparameterized_names=payload["reparameterized"],
    )


@contextmanager
def _locked(path: Path):
    """An exclusive lock on ``path`` (waits for another process that holds it); no lock if it cannot be made."""
    try:
        import fcntl

        fh = open(path, "a+b")
    except (ImportError, OSError):
        yield False
        return
    try:
        fcntl.flock(fh.fileno(), fcntl.LOCK_EX)
        yield True
    finally:
        try:
            fcntl.flock(fh.fileno(), fcntl.LOCK_UN)
        finally:
            fh.close()


def _try_load(path: Path, key: str, material: dict, model):
    """The compiled model from the entry at ``path``, or None when there is none; damaged entries are
    reported once, removed when possible, and None is returned so that the caller rebuilds."""
    if key in _IN_PROCESS:
        payload, functions = _IN_PROCESS[key]
        try:
            return _assemble(model, payload, functions)
        except DamagedEntry as exc:  # sizes differ under one fingerprint: compile this one anew
            cachedir.warn_once(
                f"sizes:{key}",
                f"a compiled model of this process cannot be reused: {exc}. It is compiled again for these sizes.",
            )
            del _IN_PROCESS[key]
            try:
                path.unlink()
            except OSError:
                pass
            return None
    if not path.is_file():
        return None
    try:
        payload = _read_entry(path, material)
        functions = _functions_from(payload)
        compiled = _assemble(model, payload, functions)
    except (DamagedEntry, OSError, KeyError, ValueError, TypeError, RuntimeError) as exc:
        STATS["damaged"] += 1
        cachedir.warn_once(
            f"damaged:{key}", f"the compile cache entry {path} cannot be used: {exc}. It is rebuilt now (one compile)."
        )
        try:
            path.unlink()
        except OSError:
            pass
        return None
    _IN_PROCESS[key] = (payload, functions)
    STATS["loaded"] += 1
    return compiled


def _layout(model) -> dict:
    """The shape-free structure of a model (names of its free variables) and the length of each dim."""
    names = sorted(model.rvs_to_values[v].name for v in model.free_RVs)
    dims = {}
    for name in model.coords:
        try:
            dims[name] = int(model.dim_lengths[name].eval())
        except Exception:  # noqa: BLE001 - a dim without a plain length is left out of the log
            continue
    return {"structure": hashlib.sha256(",".join(names).encode()).hexdigest()[:12], "free": names, "dims": dims}


def _log(model, key: str, how: str, seconds: float) -> None:
    """Append one JSON line to the file named by :data:`LOG_ENV` (nothing when it is unset or unwritable).

    Fields: ``time``, ``pid``, ``test`` (pytest's current test, when run under pytest), ``key`` (the
    cache key), ``how`` ("compiled", "loaded" from disk, or "in-process" when this process had it),
    ``seconds`` (fingerprint, load or compile), ``structure`` (a digest of the free variables' names:
    equal for models that differ only in sizes), ``free`` and ``dims`` (coordinate lengths).
    """
    target = os.environ.get(LOG_ENV)
    if not target:
        return
    rec = {
        "time": time.time(),
        "pid": os.getpid(),
        "test": os.environ.get("PYTEST_CURRENT_TEST", "").split(" ")[0],
        "key": key,
        "how": how,
        "seconds": round(seconds, 3),
        **_layout(model),
    }
    try:
        with open(target, "a", encoding="utf-8") as fh:  # one short write per line: appends do not interleave
            fh.write(json.dumps(rec) + "\n")
    except OSError:
        pass


def read_log(path) -> list[dict]:
    """The records of a compile log (see :func:`_log`); lines cut short by a killed process are skipped."""
    out = []
    try:
        text = Path(path).read_text(encoding="utf-8")
    except OSError:
        return out
    for line in text.splitlines():
        try:
            out.append(json.loads(line))
        except ValueError:
            continue
    return out


def compile_cached(model, compile_fn) -> tuple[object, str]:
    """Load ``model``'s compiled form from the cache, or compile it with ``compile_fn`` and store it.

    Returns ``(compiled, how)`` with ``how`` one of ``"loaded"`` or ``"compiled"``. With
    :data:`LOG_ENV` set, each call is logged (:func:`_log`).
    """
    t0 = time.perf_counter()
    key = None
    how = "failed"
    try:
        compiled, how, key = _compile_cached(model, compile_fn)
        return compiled, ("compiled" if how == "compiled" else "loaded")
    finally:
        if os.environ.get(LOG_ENV):
            _log(model, key or "", how, time.perf_counter() - t0)


def _compile_cached(model, compile_fn) -> tuple[object, str, str]:
    cache = cachedir.current()
    key, material = fingerprint(model)
    path = cache.models / f"{key}.model"
    in_process = key in _IN_PROCESS
    compiled = _try_load(path, key, material, model)
    if compiled is not None:
        return compiled, "in-process" if in_process else "loaded", key
    if not cache.writable:
        cachedir.warn_once(
            "read-only",
            f"the compile cache folder {cache.path} cannot be written "
            f"({cache.reason}): compiled models are kept in this process only, so every new "
            "process compiles again (tens of seconds per model). Set BAYESDID_CACHE_DIR or "
            "--cache-dir to a writable folder to keep them.",
        )
        return _compile(model, compile_fn, key, material, None), "compiled", key
    with _locked(cache.models / f"{key}.lock"):
        compiled = _try_load(path, key, material, model)  # written by another process while we waited
        if compiled is not None:
            return compiled, "loaded", key
        return _compile(model, compile_fn, key, material, path), "compiled", key


def _compile(model, compile_fn, key: str, material: dict, path: Path | None):
    compiled = compile_fn(model)
    STATS["compiled"] += 1
    payload = _payload(compiled, material)
    functions = (compiled.compiled_logp_func, compiled.compiled_expand_func)
    _IN_PROCESS[key] = (payload, functions)
    if path is not None:
        try:
            _write_entry(path, payload)
        except OSError as exc:
            STATS["store_failed"] += 1
            cachedir.warn_once(
                "store",
                f"the compiled model could not be written to the cache folder "
                f"{path.parent} ({exc.strerror or exc}): the next process compiles it again.",
            )
    return compiled


def describe(path: Path) -> dict:
    """Size and age of an entry (for ``bayesdid cache info``)."""
    st = path.stat()
    return {
        "entry": path.name,
        "bytes": st.st_size,
        "written": time.strftime("%Y-%m-%d %H:%M:%S", time.localtime(st.st_mtime)),
    }
