"""Compile an artifact's native step and plant: its programs emitted as C from their parse trees,
with the fixed sources (``linz_step.c``, ``linz_plant.c``, ``linz_fast.c``).

Each shared object is cached by the hash of everything that goes into it (the emitted program,
the fixed sources, the flags, the compiler, the interpreter), named after the artifact's hash, in the user's
cache folder (``LINZ_ROS_CACHE``, else ``$XDG_CACHE_HOME/linz_ros``, else
``~/.cache/linz_ros``). A missing compiler, a failed compile or a missing ``cffi`` raises
:class:`NativeUnavailable` with one line saying why; the caller falls back to Python.
"""

from __future__ import annotations

import hashlib
import importlib.machinery
import importlib.util
import os
import shutil
import subprocess
import sys
import sysconfig
import tempfile
from dataclasses import dataclass
from pathlib import Path
from types import ModuleType
from typing import Any

from linz_ros.artifact.compiler import c_source
from linz_ros.artifact.document import Artifact
from linz_ros.artifact.watchdog import SAFE_KINDS, setting as watchdog_setting
from linz_ros.runtime.steprecord import MODES, REASONS

__all__ = ["NativeUnavailable", "CompiledStep", "REPORT_FIELDS", "compiled_step", "compiled_plant", "cache_folder", "codes",
           "load_ffi", "open_library", "python_headers", "program_source", "HEADER"]

HERE = Path(__file__).resolve().parent
HEADER = HERE / "linz_step.h"
STEP_SOURCE = HERE / "linz_step.c"
FAST_SOURCE = HERE / "linz_fast.c"
PLANT_SOURCE = HERE / "linz_plant.c"
ELASTIC_SOURCE = HERE / "linz_elastic.c"
LINALG = HERE / "linz_linalg.h"
#: IEEE arithmetic as CPython does it: no contraction into fused multiply-adds, no fast-math.
FLAGS = ("-O2", "-std=c99", "-fPIC", "-shared", "-ffp-contract=off", "-fno-fast-math")
#: The scalar fields that open the step's report block (then u, saturated and y): its one home.
REPORT_FIELDS = ("mode", "reason", "sigma_min", "condition", "warn", "damping", "alarms", "outputs_valid")
#: Seconds a compile may take before the Python core is used instead.
COMPILE_TIMEOUT = 300.0
#: Compiled libraries kept in the cache folder; the least recently built go first.
CACHE_KEEP = 200


class NativeUnavailable(Exception):
    """The native step cannot be had on this machine; the message is the one-line reason."""


def codes() -> dict[str, dict[str, int]]:
    """The integer codes the C step uses, from their Python homes (passed to it as -D macros).

    Returns
    -------
    dict
        ``{"MODE": {...}, "REASON": {...}, "SAFE": {...}, "ENVELOPE": {...}, "DIVERGENCE": {...},
        "REPORT": {...}}``.
    """
    return {"MODE": {name: i for i, name in enumerate(MODES)},
            "REASON": {name: i for i, name in enumerate(REASONS)},
            "SAFE": {name: i for i, name in enumerate(SAFE_KINDS)},
            "ENVELOPE": {name: i for i, name in enumerate(watchdog_setting("envelope_action").choices)},
            "DIVERGENCE": {name: i for i, name in enumerate(watchdog_setting("divergence_action").choices)},
            "REPORT": {name: i for i, name in enumerate(REPORT_FIELDS)}}


def _defines() -> list[str]:
    return [f"-DLINZ_{group}_{name}={value}" for group, table in codes().items() for name, value in table.items()]


def cache_folder() -> Path:
    """Where compiled steps are kept.

    Returns
    -------
    pathlib.Path
    """
    explicit = os.environ.get("LINZ_ROS_CACHE")
    if explicit:
        return Path(explicit) / "native"
    base = os.environ.get("XDG_CACHE_HOME") or str(Path.home() / ".cache")
    return Path(base) / "linz_ros" / "native"


def find_compiler() -> str:
    """The C compiler: ``$CC``, else ``cc``, else ``gcc`` on PATH.

    Raises
    ------
    NativeUnavailable
    """
    chosen = os.environ.get("CC")
    if chosen:                   # asked for by name: that one, or the reason it cannot be used
        found = shutil.which(chosen)
        if not found:
            raise NativeUnavailable(f"CC={chosen!r} is not an executable on PATH")
        return found
    for candidate in ("cc", "gcc"):
        found = shutil.which(candidate)
        if found:
            return found
    raise NativeUnavailable("no C compiler found (CC, cc or gcc on PATH)")


def program_source(artifact: Artifact, program: str, symbol: str) -> str:
    """The artifact's program ``program`` as C (``symbol(x, p, out)``), emitted from its parse tree.

    Parameters
    ----------
    artifact : Artifact
    program : {"law", "dynamics"}
    symbol : str

    Returns
    -------
    str

    Raises
    ------
    NativeUnavailable
        For a law the native step does not evaluate (the chain form's Lie derivatives are
        Taylor-mode jets of f and h at run time). An elastic-joint law is emitted in its
        jet2 form (``symbol(x, p, out0, out1, out2, between)``).
    """
    key = (artifact.sha256, program, symbol)
    if key not in _EMITTED:
        _EMITTED[key] = _emit(artifact, program, symbol)
    return _EMITTED[key]


#: Emitted C by (artifact hash, program, symbol): emitting parses every expression again.
_EMITTED: dict[tuple[str, str, str], str] = {}


def _emit(artifact: Artifact, program: str, symbol: str) -> str:
    if program == "law" and artifact.law_form == "chain":
        raise NativeUnavailable("the chain-form law is evaluated from jets; no native form yet")
    arguments, temporaries, outputs = artifact.program_text(program)
    if len(arguments) != 2:
        raise NativeUnavailable(f"the {program} program takes {len(arguments)} argument vectors, the native "
                                "code two (x, p)")
    # an elastic-joint law runs as its jet2 form, assembled by linz_elastic.c
    jets = program == "law" and artifact.elastic
    return c_source(f"{artifact.source}: {program}", arguments, temporaries, outputs, symbol, jets=jets)[0]


@dataclass(frozen=True)
class CompiledStep:
    """A compiled native library: the shared object, and its Python module where one was built."""

    path: Path
    module: ModuleType | None


_MODULES: dict[str, ModuleType] = {}


def python_headers() -> Path | None:
    """The folder of ``Python.h`` for this interpreter, if it is installed.

    Returns
    -------
    pathlib.Path or None
    """
    include = sysconfig.get_paths().get("include")
    return Path(include) if include and (Path(include) / "Python.h").is_file() else None


def compiled_step(artifact: Artifact) -> CompiledStep:
    """This artifact's native control step, compiled now or found in the cache.

    With the Python headers present the shared object is also a Python extension module
    whose ``bind`` gives a core its fast entry (``linz_fast.c``); without them only the
    cffi route is built.

    Parameters
    ----------
    artifact : Artifact

    Returns
    -------
    CompiledStep

    Raises
    ------
    NativeUnavailable
    """
    headers = python_headers()
    fixed = [STEP_SOURCE] + ([FAST_SOURCE] if headers is not None else [])
    if artifact.elastic:
        law = program_source(artifact, "law", "linz_law_jets")
        return _library(artifact, "linz_step", law, fixed + [ELASTIC_SOURCE], headers, _elastic_defines(artifact))
    return _library(artifact, "linz_step", program_source(artifact, "law", "linz_law"), fixed, headers)


def _elastic_defines(artifact: Artifact) -> list[str]:
    """Sizes and offsets of an elastic-joint law for linz_elastic.c (artifact/elastic.py's layout)."""
    law = artifact.programs["law"]
    offsets = {"M": "M", "F": "F", "K": "stiffness", "J": "motor_inertia", "D": "motor_damping"}
    return ([f"-DLINZ_NQ={int(artifact.mechanical_coordinates)}", f"-DLINZ_JETS_SIZE={law.size}"]
            + [f"-DLINZ_OFF_{macro}={law.slots[slot].offset}" for macro, slot in offsets.items()])


def compiled_plant(artifact: Artifact) -> CompiledStep:
    """This artifact's native plant (dx/dt and RK4, ``linz_plant.c``), compiled now or found in the cache.

    Parameters
    ----------
    artifact : Artifact

    Returns
    -------
    CompiledStep
        Without a module (the plant is called through cffi).

    Raises
    ------
    NativeUnavailable
    """
    return _library(artifact, "linz_plant", program_source(artifact, "dynamics", "linz_dynamics"),
                    [PLANT_SOURCE], None)


def _library(artifact: Artifact, prefix: str, emitted: str, fixed: list[Path], headers: Path | None,
             defines: list[str] | None = None) -> CompiledStep:
    """Compile ``emitted`` with the ``fixed`` sources into one shared object, cached by the hash of it all."""
    compiler = find_compiler()
    flags = [*FLAGS, *_defines(), *(defines or [])]
    try:
        sources = [p.read_text() for p in (*fixed, HEADER, LINALG)]
    except OSError as err:
        raise NativeUnavailable(f"the native step's C sources are missing ({Path(err.filename).name}): "
                                "reinstall linz_ros") from None
    digest = hashlib.sha256()
    for part in (emitted, *sources, " ".join(flags), compiler, str(headers), sys.version):
        digest.update(part.encode())
        digest.update(b"\0")
    module_name = f"{prefix}_{digest.hexdigest()[:16]}"
    suffix = sysconfig.get_config_var("EXT_SUFFIX") or ".so"
    folder = _writable(cache_folder())
    target = folder / f"{module_name}_{artifact.sha256[:12]}{suffix}"
    if not _intact(target):      # missing, or damaged (a truncated library would crash the loader)
        if headers is not None:
            flags += ["-I", str(headers), f"-DLINZ_MODULE={module_name}"]
        _compile(compiler, flags, emitted, fixed, folder, target)
    module = None
    if headers is not None:
        module = _MODULES.get(str(target)) or _load_module(module_name, target)
        _MODULES[str(target)] = module
    return CompiledStep(target, module)


def _compile(compiler: str, flags: list[str], emitted: str, sources: list[Path], folder: Path, target: Path) -> None:
    with tempfile.TemporaryDirectory(dir=folder) as work:
        law_file = Path(work) / "emitted.c"
        law_file.write_text(emitted)
        output = Path(work) / target.name
        command = [compiler, *flags, "-I", str(HERE), str(law_file), *map(str, sources), "-o", str(output), "-lm"]
        try:
            done = subprocess.run(command, capture_output=True, text=True, timeout=COMPILE_TIMEOUT, check=False)
        except subprocess.TimeoutExpired:
            raise NativeUnavailable(f"the C compiler took over {COMPILE_TIMEOUT:.0f} s") from None
        except OSError as err:
            raise NativeUnavailable(f"the C compiler could not run ({err.strerror or err})") from None
        if done.returncode != 0 or not output.is_file():
            first = next((line for line in done.stderr.splitlines() if "error" in line), done.stderr.strip()[:200])
            raise NativeUnavailable(f"the C compiler failed: {first or f'exit {done.returncode}'}")
        digest = _file_digest(output)
        _durable_write(Path(work) / "digest", digest)
        os.replace(output, target)       # atomic: a concurrent loader sees no file or the whole new one
        os.replace(Path(work) / "digest", _digest_path(target))
    _prune(folder)


def _digest_path(target: Path) -> Path:
    return target.with_name(target.name + ".sha256")


def _file_digest(path: Path) -> str:
    with open(path, "rb") as handle:
        data = handle.read()
        os.fsync(handle.fileno())
    return hashlib.sha256(data).hexdigest()


def _durable_write(path: Path, text: str) -> None:
    with open(path, "w") as handle:
        handle.write(text)
        handle.flush()
        os.fsync(handle.fileno())


def _intact(target: Path) -> bool:
    """Whether a cached library is there and is the file that was built (its digest beside it)."""
    try:
        return _digest_path(target).read_text().strip() == _file_digest(target)
    except OSError:
        return False


def _prune(folder: Path) -> None:
    """Keep the newest :data:`CACHE_KEEP` libraries (a library in use stays mapped when its file goes)."""
    try:
        built = sorted((p for p in folder.glob("linz_*") if not p.name.endswith(".sha256")),
                       key=lambda p: p.stat().st_mtime, reverse=True)
        for old in built[CACHE_KEEP:]:
            old.unlink(missing_ok=True)
            _digest_path(old).unlink(missing_ok=True)
    except OSError:
        pass


def _load_module(name: str, path: Path) -> ModuleType:
    loader = importlib.machinery.ExtensionFileLoader(name, str(path))
    spec = importlib.util.spec_from_file_location(name, str(path), loader=loader)
    if spec is None:
        raise NativeUnavailable(f"{path} could not be loaded as a module")
    try:
        module = importlib.util.module_from_spec(spec)
        loader.exec_module(module)
    except (ImportError, OSError) as err:
        raise NativeUnavailable(f"{path.name} could not be loaded ({err})") from None
    return module


def open_library(ffi: Any, path: Path) -> Any:
    """``ffi.dlopen`` of a compiled library; a library the loader refuses is :class:`NativeUnavailable`."""
    try:
        return ffi.dlopen(str(path))
    except OSError as err:
        raise NativeUnavailable(f"{path.name} could not be loaded ({err})") from None


def _writable(folder: Path) -> Path:
    """``folder``, or this user's folder under the system's temporary one when it cannot be written.

    Raises
    ------
    NativeUnavailable
        When neither can be written.
    """
    for candidate in (folder, Path(tempfile.gettempdir()) / f"linz_ros-{os.getuid()}" / "native"):
        try:
            candidate.mkdir(parents=True, exist_ok=True)
            probe = tempfile.NamedTemporaryFile(dir=candidate)
            probe.close()
            return candidate
        except OSError:
            continue
    raise NativeUnavailable(f"no writable cache folder ({folder} nor the temporary folder)")


def load_ffi() -> Any:
    """cffi's FFI with the step's declarations (the header is their one home).

    Raises
    ------
    NativeUnavailable
        When cffi is not installed.
    """
    try:
        import cffi
    except ImportError:
        raise NativeUnavailable("cffi is not installed (pip install 'linz_ros[native]')") from None
    ffi = cffi.FFI()
    try:
        ffi.cdef(HEADER.read_text())
    except OSError:
        raise NativeUnavailable("the native step's C sources are missing (linz_step.h): reinstall linz_ros") from None
    return ffi
