"""Optional native kernel: Philox4x32-10 uniforms, and the exact Bernoulli comparison fused with drawing
them, in one pass over CPU tensor memory.

The C source ``_philox.c`` beside this file is compiled on first use by the system C compiler and
called through ``ctypes``. Without a compiler (or with ``EBM_LAYERS_NATIVE=0``) :func:`available` is
False, :data:`unavailable_reason` says why, and callers keep to the pure-torch path.

The stream. Philox4x32-10 is the counter-based generator of Salmon, Moraes, Dror and Shaw, "Parallel
Random Numbers: As Easy as 1, 2, 3" (SC 2011): a 128-bit counter of four 32-bit words, a 64-bit key of
two, ten rounds with multipliers ``0xD2511F53`` and ``0xCD9E8D57`` and key increments ``0x9E3779B9``
and ``0xBB67AE85``. Block ``i`` of the stream of ``key`` is Philox of counter words
``(lo32(i), hi32(i), 0, 0)`` (``i`` a uint64) and key words ``(lo32(key), hi32(key))``; its four
output words are words ``w[4i] .. w[4i + 3]`` of the stream. Uniform number ``j`` is

- float32: ``(w[j] >> 8) * 2^-24``, on the grid ``k / 2^24`` in [0, 1);
- float64: ``((w[2j] >> 5) * 2^26 + (w[2j + 1] >> 6)) * 2^-53``, on the grid ``k / 2^53``.

Element ``j`` of a call with ``offset`` is number ``offset + j``, so consecutive calls with offsets
``a`` and ``a + n`` continue one stream. These are the grids of torch's ``uniform_``, so the
comparison below is the one of :func:`ebm_layers.model.functional.bernoulli_from_uniforms`.

The binary is cached in ``$EBM_LAYERS_CACHE``, else ``$XDG_CACHE_HOME/ebm_layers``, else
``~/.cache/ebm_layers``, under a name hashing the source, the compiler, its flags and the CPU (a
``-march=native`` build is not reused on another CPU). ``EBM_LAYERS_NATIVE=0`` is read at every
:func:`available` call (so callers must ask it before choosing this path; :func:`fill_uniforms` and
:func:`bernoulli` do not read it again, to keep their overhead to about 3 us). The build is tried once per
process, at the first call that is not disabled.
"""

from __future__ import annotations

import ctypes
import hashlib
import operator
import os
import platform
import shlex
import shutil
import subprocess
import tempfile
from collections.abc import Callable
from pathlib import Path

import torch
from torch import Tensor

__all__ = ["available", "bernoulli", "fill_uniforms", "unavailable_reason"]

_SOURCE = Path(__file__).with_name("_philox.c")
_BASE_FLAGS = ["-O3", "-fPIC", "-shared", "-std=c99"]
# -march=native (AVX2 where the CPU has it) and -fopenmp (torch's threads, see _philox.c) first;
# without them if the compiler refuses.
_FLAG_SETS = (["-march=native", "-fopenmp", *_BASE_FLAGS], ["-march=native", *_BASE_FLAGS], _BASE_FLAGS)
_SUFFIXES = {torch.float32: "f32", torch.float64: "f64"}
_LIMIT = 1 << 64
# The kernels by dtype: (fill, bernoulli) ctypes functions.
_Kernels = dict[torch.dtype, tuple[Callable[..., None], Callable[..., int]]]

# Why the kernel is not available (None while it is, or before the first check).
unavailable_reason: str | None = None
# The loaded kernels, or the reason the build failed; None until the first check.
_loaded: _Kernels | str | None = None


def available() -> bool:
    """Whether the native kernel can be used (building it on the first call)."""
    global _loaded, unavailable_reason
    if os.environ.get("EBM_LAYERS_NATIVE", "").strip() == "0":
        unavailable_reason = "disabled by EBM_LAYERS_NATIVE=0"
        return False
    if _loaded is None:
        _loaded = _load(_cache_dir(), _compiler())
    unavailable_reason = _loaded if isinstance(_loaded, str) else None
    return unavailable_reason is None


def fill_uniforms(out: Tensor, key: int, offset: int) -> Tensor:
    """Fill ``out`` (any shape, contiguous float32/float64 on CPU) with numbers ``offset ..
    offset + out.numel() - 1`` of the stream of ``key``; returns ``out``."""
    fill, _ = _kernels(out, "out")[out.dtype]
    key, offset = _stream_position(key, offset, out.numel())
    fill(out.data_ptr(), out.numel(), key, offset)  # on torch's OpenMP threads when large (_philox.c)
    return out


def bernoulli(p: Tensor, out: Tensor, key: int, offset: int) -> int:
    """With ``u`` the uniforms that ``fill_uniforms(out, key, offset)`` would write and ``d = p - u``
    (rounded as torch does): write ``out = (d >= grid)`` as 0/1 (``grid`` = 2^-24 in float32, 2^-53
    in float64) and return the number of units with ``0 < d < grid``, which the caller must still
    decide. ``p`` and ``out`` have one shape and dtype (contiguous, CPU); ``out`` may be ``p`` but
    may not overlap it otherwise. NaN probabilities give 0 and are not counted."""
    _, compare = _kernels(p, "p")[p.dtype]
    _check_tensor(out, "out")
    if out.dtype != p.dtype:
        raise TypeError(f"out has dtype {out.dtype}, p has {p.dtype}: they must match")
    if out.shape != p.shape:
        raise ValueError(f"out has shape {tuple(out.shape)}, p has {tuple(p.shape)}: they must match")
    size = p.numel() * p.element_size()
    if out.data_ptr() != p.data_ptr() and abs(out.data_ptr() - p.data_ptr()) < size:
        raise ValueError("out overlaps p without being p")
    key, offset = _stream_position(key, offset, p.numel())
    return int(compare(p.data_ptr(), out.data_ptr(), p.numel(), key, offset))


def _kernels(tensor: Tensor, name: str) -> _Kernels:
    """The loaded kernels (trying the build if no call has yet), after checking the tensor argument
    ``name``."""
    _check_tensor(tensor, name)
    if not isinstance(_loaded, dict) and not available():
        raise RuntimeError(f"the native kernel is not available: {unavailable_reason}")
    assert isinstance(_loaded, dict)  # for type checkers: available() built it
    return _loaded


def _check_tensor(tensor: Tensor, name: str) -> None:
    if not isinstance(tensor, Tensor):
        raise TypeError(f"{name} must be a torch.Tensor, got {type(tensor).__name__}")
    if tensor.dtype not in _SUFFIXES:
        raise TypeError(f"{name} has dtype {tensor.dtype}; the native kernel takes float32 or float64")
    if not tensor.is_cpu:
        raise ValueError(f"{name} is on device {tensor.device}; the native kernel takes CPU tensors")
    if not tensor.is_contiguous():
        raise ValueError(f"{name} (shape {tuple(tensor.shape)}, strides {tensor.stride()}) is not contiguous")


def _stream_position(key: int, offset: int, count: int) -> tuple[int, int]:
    """``key`` and ``offset`` as ints in [0, 2^64), checking that ``count`` numbers from ``offset``
    stay below 2^64."""
    values = []
    for name, value in (("key", key), ("offset", offset)):
        try:
            number = operator.index(value)
        except TypeError:
            raise TypeError(f"{name} must be an int, got {value!r}") from None
        if not 0 <= number < _LIMIT:
            raise ValueError(f"{name} must be in [0, 2^64), got {number}")
        values.append(number)
    if values[1] + count > _LIMIT:
        raise ValueError(f"offset {values[1]} + {count} numbers passes the end of the stream (2^64)")
    return values[0], values[1]


def _cache_dir() -> Path:
    if os.environ.get("EBM_LAYERS_CACHE"):
        return Path(os.environ["EBM_LAYERS_CACHE"])
    base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
    return Path(base) / "ebm_layers"


def _compiler() -> list[str] | None:
    """``$CC`` (split as a shell would), else ``cc`` or ``gcc`` on the PATH; None when there is none."""
    if os.environ.get("CC"):
        try:
            return shlex.split(os.environ["CC"])
        except ValueError:  # unbalanced quotes: try it as one word, for the build to report
            return [os.environ["CC"]]
    found = shutil.which("cc") or shutil.which("gcc")
    return [found] if found else None


def _machine() -> str:
    """The machine and a hash of its CPU features (the ``flags`` line of /proc/cpuinfo, if any)."""
    features = ""
    try:
        with open("/proc/cpuinfo") as info:
            features = next((line for line in info if line.startswith(("flags", "Features"))), "")
    except OSError:
        pass
    return f"{platform.machine()}-{hashlib.sha256(features.encode()).hexdigest()[:12]}"


def _load(cache_dir: Path, compiler: list[str] | None) -> _Kernels | str:
    """The kernels by dtype, built into (or reused from) ``cache_dir`` with ``compiler``, or the
    reason they cannot be had. Never raises."""
    if compiler is None:
        return "no C compiler found ($CC, cc or gcc)"
    try:
        source = _SOURCE.read_bytes()
        cache_dir.mkdir(parents=True, exist_ok=True)
    except OSError as error:
        return f"cannot read the source or create the cache directory {cache_dir}: {error}"
    failures = []
    for flags in _FLAG_SETS:
        identity = b"\0".join([source, " ".join([*compiler, *flags]).encode(), _machine().encode()])
        digest = hashlib.sha256(identity)
        target = cache_dir / f"philox-{platform.machine()}-{digest.hexdigest()[:16]}.so"
        failure = None if target.exists() else _build(compiler, flags, target)
        if failure is None:
            try:
                return _bind(ctypes.CDLL(str(target)))
            except (OSError, AttributeError) as error:
                failure = f"cannot load {target}: {error}"
        failures.append(failure)
    return "; ".join(failures)


def _build(compiler: list[str], flags: list[str], target: Path) -> str | None:
    """Compile the source into ``target`` through a temporary file renamed into place (several
    processes may build at once); the reason on failure, else None."""
    command = [*compiler, *flags]
    try:
        handle, temporary = tempfile.mkstemp(prefix=".philox-", suffix=".so", dir=target.parent)
        os.close(handle)
    except OSError as error:
        return f"cannot write to the cache directory {target.parent}: {error}"
    try:
        result = subprocess.run(
            [*command, "-o", temporary, str(_SOURCE)], capture_output=True, text=True, timeout=300
        )
        if result.returncode != 0:
            return f"{' '.join(command)} failed ({result.returncode}): {result.stderr.strip()[-500:]}"
        os.replace(temporary, target)
        return None
    except (OSError, subprocess.SubprocessError) as error:
        return f"cannot run {' '.join(command)}: {error}"
    finally:
        if os.path.exists(temporary):
            os.remove(temporary)


def _bind(library: ctypes.CDLL) -> _Kernels:
    """The kernels of ``library`` with their argument types set (pointers passed as ints)."""
    kernels = {}
    for dtype, suffix in _SUFFIXES.items():
        fill = getattr(library, f"ebm_uniform_{suffix}")
        fill.argtypes = [ctypes.c_void_p, ctypes.c_int64, ctypes.c_uint64, ctypes.c_uint64]
        fill.restype = None
        compare = getattr(library, f"ebm_bernoulli_{suffix}")
        compare.argtypes = [ctypes.c_void_p, *fill.argtypes]
        compare.restype = ctypes.c_int64
        kernels[dtype] = (fill, compare)
    return kernels
