"""Build the C board side (protocol/c/) with the system C compiler, into a cache folder.

This is host tooling, not part of the pure codec: it runs a compiler. Outputs are cached under a
key made of the source texts, the flags and the compiler's own version line, so an edit of any
source, or another compiler, gives a fresh build; each output is written under a temporary name
and renamed into place, so concurrent builds never see a half-written file.

Where: ``$TETHERLOOP_CACHE_DIR/c-build`` if set, else ``$XDG_CACHE_HOME/tetherloop/c-build``
(``~/.cache/tetherloop/c-build``), else the system's temporary folder when that is not writable.
Which compiler: ``$CC`` if set, else the first of ``cc``, ``gcc``, ``clang`` on the PATH.
"""

from __future__ import annotations

import hashlib
import os
import shlex
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

from agent.errors import UserError

C_DIR = Path(__file__).resolve().parent
GENERATED_DIR = C_DIR / "generated"
HARNESS_DIR = C_DIR / "harness"

#: The library proper, in link order. Nothing else is needed on a board.
LIBRARY_SOURCES = ("tl_wire.c", "tl_crc.c", "tl_cobs.c", "tl_ring.c", "tl_frame.c",
                   "generated/tl_messages.c")

#: Every build of the library uses these: C99, every warning an error.
STRICT_FLAGS = ("-std=c99", "-Wall", "-Wextra", "-Werror", "-pedantic", "-Wconversion",
                "-Wsign-conversion", "-Wshadow", "-Wstrict-prototypes", "-Wmissing-prototypes")

#: Flags of a build under AddressSanitizer and UndefinedBehaviorSanitizer; any report aborts.
SANITIZE_FLAGS = ("-fsanitize=address,undefined", "-fno-sanitize-recover=all",
                  "-fno-omit-frame-pointer", "-g")

_COMPILERS = ("cc", "gcc", "clang")


class CBuildError(UserError):
    """The C board side could not be built (no compiler, or the compiler refused the sources)."""


def find_compiler() -> list[str]:
    """The C compiler command to use, as an argument list.

    Returns
    -------
    list[str]
        ``$CC`` split like a shell word list when set, else the first of cc, gcc, clang found.

    Raises
    ------
    CBuildError
        No C compiler: the message names what was looked for and how to install one.
    """
    env = os.environ.get("CC", "").strip()
    if env:
        cmd = shlex.split(env)
        if shutil.which(cmd[0]) is None:
            raise CBuildError(f"the C compiler named by $CC ({env!r}) was not found on the PATH; "
                              "set CC to an installed compiler or unset it")
        return cmd
    for name in _COMPILERS:
        path = shutil.which(name)
        if path:
            return [path]
    raise CBuildError("no C compiler found (looked for $CC, then " + ", ".join(_COMPILERS)
                      + " on the PATH); the C board side is built from source: install one, "
                      "e.g. `apt-get install gcc` on Debian or Ubuntu, then try again")


def compiler_version(cc: list[str]) -> str:
    """First line of ``cc --version`` (part of the cache key)."""
    try:
        out = subprocess.run([*cc, "--version"], capture_output=True, text=True, timeout=30)
    except OSError as exc:
        raise CBuildError(f"cannot run the C compiler {cc[0]}: {exc.strerror}") from None
    return (out.stdout or out.stderr).splitlines()[0] if (out.stdout or out.stderr) else cc[0]


def cache_dir() -> Path:
    """The folder builds are cached in (created); see the module docstring for the order."""
    if os.environ.get("TETHERLOOP_CACHE_DIR"):
        base = Path(os.environ["TETHERLOOP_CACHE_DIR"])
    else:
        base = Path(os.environ.get("XDG_CACHE_HOME") or Path.home() / ".cache") / "tetherloop"
    user = getattr(os, "getuid", lambda: 0)()
    for folder in (base / "c-build", Path(tempfile.gettempdir()) / f"tetherloop-c-{user}"):
        try:
            folder.mkdir(parents=True, exist_ok=True)
            if os.access(folder, os.W_OK):
                return folder
        except OSError:
            continue
    raise CBuildError(f"no writable folder for the C build (tried {base / 'c-build'} and the "
                      "temporary folder); set TETHERLOOP_CACHE_DIR to a writable folder")


def library_sources() -> list[Path]:
    """The C files of the board-side library, in build order."""
    return [C_DIR / s for s in LIBRARY_SOURCES]


def _all_inputs(extra_sources) -> list[Path]:
    headers = sorted(C_DIR.glob("*.h")) + sorted(GENERATED_DIR.glob("*.h"))
    return library_sources() + [Path(p) for p in extra_sources] + headers


def _key(cc: list[str], flags: list[str], inputs: list[Path]) -> str:
    h = hashlib.sha256()
    h.update(compiler_version(cc).encode())
    h.update("\0".join(cc + flags).encode())
    for path in inputs:
        h.update(path.name.encode())
        h.update(path.read_bytes())
    return h.hexdigest()[:16]


def _compile(cc: list[str], args: list[str], output: Path) -> None:
    tmp = output.with_name(f".{output.name}.{os.getpid()}.tmp")
    cmd = [*cc, *args, "-o", str(tmp)]
    try:
        res = subprocess.run(cmd, capture_output=True, text=True, timeout=300)
    except OSError as exc:
        raise CBuildError(f"cannot run the C compiler {cc[0]}: {exc.strerror}") from None
    if res.returncode != 0:
        tmp.unlink(missing_ok=True)
        raise CBuildError(f"the C compiler failed (exit {res.returncode}) building {output.name}:"
                          f"\n  {shlex.join(cmd)}\n{res.stderr.strip()}")
    os.replace(tmp, output)


def build(kind: str = "shared", extra_sources=(), sanitize: bool = False,
          optimize: str = "-O2", name: str | None = None) -> Path:
    """Build the library (with ``extra_sources``) and return the path of the result.

    Parameters
    ----------
    kind : {"shared", "program"}
        A shared library to load with ctypes, or an executable (one of ``extra_sources`` holds
        ``main``).
    extra_sources : iterable of path
        C files compiled with the library, e.g. a harness from protocol/c/harness/.
    sanitize : bool
        Build under AddressSanitizer and UndefinedBehaviorSanitizer (``SANITIZE_FLAGS``).
    optimize : str
        Optimisation flag.
    name : str, optional
        Base name of the output (default from ``kind`` and the first extra source).

    Returns
    -------
    Path
        The cached output; built only when no output with the same key exists.

    Raises
    ------
    CBuildError
        No compiler, no writable cache folder, or a compile error (with the compiler's output).
    """
    if kind not in ("shared", "program"):
        raise ValueError(f"kind must be 'shared' or 'program', not {kind!r}")
    cc = find_compiler()
    extra = [Path(p) for p in extra_sources]
    flags = [*STRICT_FLAGS, optimize, f"-I{C_DIR}", f"-I{GENERATED_DIR}"]
    if sanitize:
        flags += SANITIZE_FLAGS
    if kind == "shared":
        flags += ["-shared", "-fPIC"]
    key = _key(cc, flags, _all_inputs(extra))
    stem = name or ("libtetherloop" if kind == "shared" else (extra[0].stem if extra else "prog"))
    suffix = ".so" if kind == "shared" and sys.platform != "darwin" else (
        ".dylib" if kind == "shared" else "")
    output = cache_dir() / f"{stem}-{key}{'-san' if sanitize else ''}{suffix}"
    if not output.exists():
        _compile(cc, flags + [str(p) for p in library_sources() + extra], output)
    return output


def sanitizers_available() -> tuple[bool, str]:
    """Whether the compiler builds and runs a program under ASan and UBSan here.

    Returns
    -------
    (bool, str)
        True and "" when it does; False and the reason (the compiler's or the program's own
        words) when not.
    """
    cc = find_compiler()
    with tempfile.TemporaryDirectory() as tmp:
        src = Path(tmp) / "probe.c"
        src.write_text("int main(void) { return 0; }\n")
        exe = Path(tmp) / "probe"
        res = subprocess.run([*cc, *SANITIZE_FLAGS, str(src), "-o", str(exe)],
                             capture_output=True, text=True, timeout=120)
        if res.returncode != 0:
            return False, (f"{cc[0]} cannot build with {' '.join(SANITIZE_FLAGS[:1])}: "
                           + (res.stderr.strip().splitlines() or ["no message"])[-1])
        run = subprocess.run([str(exe)], capture_output=True, text=True, timeout=60)
        if run.returncode != 0:
            return False, ("a program built with the sanitizers does not run here: "
                           + (run.stderr.strip().splitlines() or ["no message"])[-1])
    return True, ""


if __name__ == "__main__":  # pragma: no cover
    print(build())
