"""Files: atomic writes, a path check before a run, and a guarded reader of our ``.npz`` files.

**Writing.** Every file goes to a unique temporary in the destination's folder, created by
``tempfile.mkstemp`` (``O_CREAT | O_EXCL``: a file or symlink planted at that name is never
opened, followed or overwritten), named ``.<name>.flowpost-<host>-<pid>.<random>.part``; it is
flushed and ``fsync``-ed, then renamed onto the destination with ``os.replace`` (atomic within
one file system). A reader, a crash or a ``SIGKILL`` at any moment finds the old file or the
new one, whole. On any error or interrupt the temporary is removed; a temporary left by a
killed process (which runs no clean-up) is removed by the next write to the same
destination or the next :func:`check_writable` of it, once its process no longer exists on
this host.

**Archives.** Our files are NumPy ``.npz`` archives (uncompressed ZIP members, one ``.npy``
array each) written by :func:`write_npz`, with a ``digest`` member: the SHA-256 of the
sorted member names and the SHA-256 of each member's bytes. :class:`Archive` reads one
without trusting it: every member must be stored uncompressed, lie inside the file, and
have a ``.npy`` header (read with a bounded size) whose dtype holds no Python objects and
whose shape times item size is exactly the member's size, all before any array is
allocated; the metadata must be JSON text nested at most :data:`MAX_DEPTH` levels; the
digest must match. Every refusal names the argument and the path and says what is wrong:
``path: expected a flowpost result file; got '<path>', which is not a readable flowpost
result file (<what is wrong>)``.
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import math
import os
import socket
import stat
import struct
import tempfile
import zipfile
from collections.abc import Callable, Mapping
from typing import Any, BinaryIO

import numpy as np

from .._validate import describe, fail

__all__ = [
    "MAX_DEPTH",
    "Archive",
    "Unreadable",
    "atomic_write",
    "check_path",
    "check_writable",
    "committed_step",
    "history_problem",
    "is_figure",
    "is_int",
    "is_number",
    "is_report_value",
    "is_shape",
    "is_str_list",
    "read_result_file",
    "remove_stale_temporaries",
    "temporary_prefix",
    "write_npz",
]

#: Deepest nesting of lists / objects accepted in a file's JSON metadata.
MAX_DEPTH = 32
#: Largest ``.npy`` header read (NumPy writes headers of a few hundred bytes).
MAX_HEADER = 10_000
#: Most members accepted in one archive.
MAX_MEMBERS = 100_000
DIGEST_MEMBER = "digest"
# what parsing a damaged or hostile archive can raise (zipfile: RuntimeError for encryption,
# struct.error for malformed records)
_PARSE_ERRORS = (
    zipfile.BadZipFile,
    OSError,
    ValueError,
    EOFError,
    KeyError,
    TypeError,
    RuntimeError,
    NotImplementedError,
    OverflowError,
    struct.error,
)
_CHUNK = 1 << 22


# ----- paths ---------------------------------------------------------------------------------
def check_path(path: Any, name: str) -> str:
    """``path`` as a ``str`` (a ``str`` or ``os.PathLike`` of one; nothing else)."""
    if isinstance(path, os.PathLike):
        path = os.fspath(path)
    if not isinstance(path, str):
        raise fail(name, "a file path (str or os.PathLike)", path, TypeError)
    if not path:
        raise fail(name, "a file path", path)
    return path


def _tag() -> str:
    host = "".join(c if c.isalnum() or c in "_-" else "_" for c in socket.gethostname())[:40]
    return f"flowpost-{host}-{os.getpid()}"


def _temporary_prefix(path: str) -> str:
    return f".{os.path.basename(path)}."


def temporary_prefix(path: str | os.PathLike) -> str:
    """The start of this process's temporary names for ``path``:
    ``.<name>.flowpost-<host>-<pid>.`` (``tempfile.mkstemp`` adds a random part and
    ``.part``)."""
    return f"{_temporary_prefix(os.fspath(path))}{_tag()}."


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except OSError:  # exists, owned by someone else
        return True
    return True


def remove_stale_temporaries(path: str | os.PathLike) -> list[str]:
    """Remove the temporaries of ``path`` left by killed writers (their process no longer
    exists on this host); returns the names removed. Temporaries of live processes, of other
    hosts and anything that is not a regular file are left alone. POSIX only."""
    if os.name != "posix":
        return []
    path = os.fspath(path)
    folder = os.path.dirname(os.path.abspath(path))
    prefix = _temporary_prefix(path)
    own_host = _tag().rsplit("-", 1)[0] + "-"
    removed = []
    try:
        entries = os.listdir(folder)
    except OSError:
        return []
    for entry in entries:
        if not (entry.startswith(prefix + own_host) and entry.endswith(".part")):
            continue
        middle = entry[len(prefix) + len(own_host) : -len(".part")]
        pid_text = middle.split(".", 1)[0]
        if not pid_text.isdigit() or _alive(int(pid_text)):
            continue
        full = os.path.join(folder, entry)
        with contextlib.suppress(OSError):
            if stat.S_ISREG(os.lstat(full).st_mode):
                os.unlink(full)
                removed.append(entry)
    return removed


def check_writable(path: Any, name: str = "checkpoint") -> str:
    """Check, before any work is done, that a file can be written at ``path``: a file path
    (not a folder) in an existing folder where a temporary can be created. Returns the path
    as ``str``; raises ``TypeError`` / ``ValueError`` naming ``name``."""
    path = check_path(path, name)
    if os.path.isdir(path):
        raise ValueError(f"{name}: expected a file path; got '{path}', which is a folder")
    folder = os.path.dirname(os.path.abspath(path))
    if not os.path.exists(folder):
        raise ValueError(f"{name}: expected a file path in an existing folder; got '{path}' (no folder '{folder}')")
    if not os.path.isdir(folder):
        raise ValueError(f"{name}: expected a file path in a folder; got '{path}' ('{folder}' is not a folder)")
    try:
        fd, probe = tempfile.mkstemp(prefix=temporary_prefix(path), suffix=".part", dir=folder)
    except OSError as err:
        raise ValueError(
            f"{name}: expected a file path in a folder this process can write to; got '{path}' "
            f"(creating a file in '{folder}' failed: {err.strerror or err})"
        ) from None
    os.close(fd)
    with contextlib.suppress(OSError):
        os.unlink(probe)
    remove_stale_temporaries(path)
    return path


def atomic_write(path: str | os.PathLike, write: Callable[[BinaryIO], object]) -> None:
    """Call ``write(file_object)`` on a unique temporary in ``path``'s folder, flush and fsync
    it, and rename it onto ``path`` (module docstring). The old file stays whole until the
    rename; on any exception (``KeyboardInterrupt`` included) the temporary is removed."""
    path = os.fspath(path)
    folder = os.path.dirname(os.path.abspath(path))
    remove_stale_temporaries(path)
    fd, tmp = tempfile.mkstemp(prefix=temporary_prefix(path), suffix=".part", dir=folder)
    try:
        with os.fdopen(fd, "wb") as fh:
            try:  # mkstemp makes the file private (0600); keep the mode a replaced file had
                mode = stat.S_IMODE(os.stat(path).st_mode)
            except OSError:
                mode = 0o644
            with contextlib.suppress(OSError, AttributeError):
                os.fchmod(fh.fileno(), mode)
            write(fh)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise
    if os.name == "posix":  # make the rename itself durable
        with contextlib.suppress(OSError):
            dfd = os.open(folder, os.O_RDONLY)
            try:
                os.fsync(dfd)
            finally:
                os.close(dfd)


# ----- archives ------------------------------------------------------------------------------
class _HashingWriter:
    """A write-only file object that hashes what passes through it."""

    def __init__(self, fh: Any):
        self.fh = fh
        self.hash = hashlib.sha256()

    def write(self, data: Any) -> int:
        self.hash.update(data)
        return self.fh.write(data)


def _combine(member_hashes: Mapping[str, str]) -> str:
    total = hashlib.sha256()
    for key in sorted(member_hashes):
        total.update(f"{key}\n{member_hashes[key]}\n".encode())
    return total.hexdigest()


def write_npz(fh: BinaryIO, arrays: Mapping[str, Any]) -> None:
    """Write ``arrays`` (member name -> array; a ``str`` becomes a 0-d text array) to the
    open binary file ``fh`` as an uncompressed ``.npz`` archive with a ``digest`` member
    (module docstring). Arrays holding Python objects are refused."""
    hashes: dict[str, str] = {}
    with zipfile.ZipFile(fh, "w", compression=zipfile.ZIP_STORED, allowZip64=True) as zf:
        for key, value in arrays.items():
            arr = np.asarray(value)
            with zf.open(f"{key}.npy", "w", force_zip64=True) as member:
                sink = _HashingWriter(member)
                np.lib.format.write_array(sink, arr, allow_pickle=False)
            hashes[key] = sink.hash.hexdigest()
        with zf.open(f"{DIGEST_MEMBER}.npy", "w") as member:
            np.lib.format.write_array(member, np.array(_combine(hashes)), allow_pickle=False)


class Unreadable(ValueError):
    """A file that is not a readable flowpost file (a ``ValueError``)."""


def _depth_exceeds(value: Any, limit: int) -> bool:
    stack = [(value, 1)]
    while stack:
        v, d = stack.pop()
        if isinstance(v, (list, dict)):
            if d > limit:
                return True
            stack.extend((c, d + 1) for c in (v.values() if isinstance(v, dict) else v))
    return False


class Archive:
    """One of our ``.npz`` files, opened without trusting it (module docstring).

    Parameters
    ----------
    path : str or os.PathLike
        The file.
    name : str
        The argument that named it (for messages), e.g. ``"path"`` or ``"resume"``.
    what : str
        The kind of file, e.g. ``"result"`` or ``"checkpoint"``.

    Every member's ``.npy`` header is read and checked against the member's size when the
    archive is opened; :meth:`array` then reads a member (hashing its bytes),
    :meth:`meta` the JSON metadata, :meth:`verify` the digest.
    """

    def __init__(self, path: Any, name: str, what: str):
        self.path = check_path(path, name)
        self.name, self.what = name, what
        self.headers: dict[str, tuple[np.dtype, tuple[int, ...], bool, int]] = {}
        self._hashes: dict[str, str] = {}
        if os.path.isdir(self.path):
            raise self.bad("it is a folder")
        if os.path.exists(self.path) and not os.path.isfile(self.path):
            raise self.bad("it is not a regular file")  # a pipe or a device would block or never end
        try:
            size = os.path.getsize(self.path)
            self._zip = zipfile.ZipFile(self.path)
        except FileNotFoundError:
            raise FileNotFoundError(
                f"{name}: expected an existing flowpost {what} file; got '{self.path}' (no such file)"
            ) from None
        except _PARSE_ERRORS as err:
            raise self.bad(f"not an .npz archive: {err}") from None
        try:
            self._read_headers(size)
        except Unreadable:
            self.close()
            raise
        except _PARSE_ERRORS as err:
            self.close()
            raise self.bad(f"damaged archive: {err}") from None

    # context manager -------------------------------------------------------------------
    def __enter__(self) -> Archive:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def close(self) -> None:
        self._zip.close()

    def bad(self, reason: str) -> Unreadable:
        """The refusal for this file (not raised)."""
        return Unreadable(
            f"{self.name}: expected a flowpost {self.what} file; got '{self.path}', which is not a "
            f"readable flowpost {self.what} file ({reason})"
        )

    # headers ---------------------------------------------------------------------------
    def _read_headers(self, size: int) -> None:
        infos = self._zip.infolist()
        if len(infos) > MAX_MEMBERS:
            raise self.bad(f"{len(infos)} members")
        seen: set[str] = set()
        for info in infos:
            fname = info.filename
            if not fname.endswith(".npy") or fname in seen:
                raise self.bad(f"member '{fname}' is {'repeated' if fname in seen else 'not a .npy array'}")
            seen.add(fname)
            key = fname[: -len(".npy")]
            if info.flag_bits & 0x1:
                raise self.bad(f"member '{key}' is encrypted")
            if info.compress_type != zipfile.ZIP_STORED:
                raise self.bad(f"member '{key}' is compressed; flowpost stores its members uncompressed")
            if info.file_size != info.compress_size or info.header_offset + info.compress_size > size:
                raise self.bad(f"member '{key}' claims {info.file_size} bytes in a file of {size} bytes")
            with self._zip.open(info) as fh:
                version = np.lib.format.read_magic(fh)
                if version == (1, 0):
                    shape, fortran, dtype = np.lib.format.read_array_header_1_0(fh, max_header_size=MAX_HEADER)
                elif version == (2, 0):
                    shape, fortran, dtype = np.lib.format.read_array_header_2_0(fh, max_header_size=MAX_HEADER)
                else:
                    raise self.bad(f"member '{key}' has .npy format version {version}")
                header_len = fh.tell()
            if dtype.hasobject:
                raise self.bad(f"member '{key}' holds Python objects (flowpost files hold numbers and text)")
            if any(int(n) < 0 for n in shape):
                raise self.bad(f"member '{key}' claims the shape {shape}")
            nbytes = math.prod(int(n) for n in shape) * dtype.itemsize
            if header_len + nbytes != info.file_size:
                raise self.bad(
                    f"member '{key}' claims shape {tuple(shape)} of {dtype} ({nbytes} bytes) but holds "
                    f"{info.file_size - header_len} bytes"
                )
            self.headers[key] = (dtype, tuple(int(n) for n in shape), bool(fortran), header_len)

    def members(self) -> set[str]:
        """The member names (without ``.npy``)."""
        return set(self.headers)

    def require_members(self, expected: set[str], optional: frozenset[str] | set[str] = frozenset()) -> None:
        """Refuse missing or unexpected members."""
        have = self.members()
        missing, extra = sorted(expected - have), sorted(have - expected - optional)
        if missing:
            raise self.bad(f"missing member(s) {missing}")
        if extra:
            raise self.bad(f"unexpected member(s) {extra}")

    def header(self, key: str) -> tuple[np.dtype, tuple[int, ...]]:
        """A member's dtype and shape, from its header (nothing allocated)."""
        if key not in self.headers:
            raise self.bad(f"missing member '{key}'")
        dtype, shape, _, _ = self.headers[key]
        return dtype, shape

    # contents --------------------------------------------------------------------------
    def array(self, key: str) -> np.ndarray:
        """Read one member (its size was checked when the archive was opened)."""
        dtype, shape = self.header(key)
        _, _, fortran, header_len = self.headers[key]
        nbytes = math.prod(shape) * dtype.itemsize
        digest = hashlib.sha256()
        try:
            with self._zip.open(f"{key}.npy") as fh:
                head = fh.read(header_len)
                data = fh.read(nbytes)
                rest = fh.read()  # reaching the end checks the member's CRC
        except _PARSE_ERRORS as err:
            raise self.bad(f"member '{key}' is damaged: {err}") from None
        if len(head) != header_len or len(data) != nbytes or rest:
            raise self.bad(f"member '{key}' is truncated")
        digest.update(head)
        digest.update(data)
        self._hashes[key] = digest.hexdigest()
        flat = np.frombuffer(data, dtype=dtype).copy()
        return flat.reshape(shape[::-1]).T if fortran else flat.reshape(shape)

    def text(self, key: str) -> str:
        """A 0-d text member."""
        dtype, shape = self.header(key)
        if dtype.kind != "U" or shape != ():
            raise self.bad(f"member '{key}' should be text; it is {dtype} of shape {shape}")
        return str(self.array(key).item())

    def meta(self, key: str = "meta") -> dict[str, Any]:
        """The JSON metadata: an object nested at most :data:`MAX_DEPTH` levels."""
        text = self.text(key)
        try:
            meta = json.loads(text)
        except RecursionError:
            raise self.bad("the metadata is nested too deeply") from None
        except ValueError as err:
            raise self.bad(f"the metadata is not JSON: {err}") from None
        if not isinstance(meta, dict):
            raise self.bad(f"the metadata should be a JSON object; it is {type(meta).__name__}")
        if _depth_exceeds(meta, MAX_DEPTH):
            raise self.bad(f"the metadata is nested deeper than {MAX_DEPTH} levels")
        return meta

    def expect(self, meta: Mapping[str, Any], key: str, test: Callable[[Any], bool], wanted: str) -> Any:
        """``meta[key]`` when ``test`` accepts it, else a refusal naming the field."""
        if key not in meta:
            raise self.bad(f"the metadata has no '{key}'")
        value = meta[key]
        ok = False
        with contextlib.suppress(Exception):
            ok = bool(test(value))
        if not ok:
            raise self.bad(f"metadata '{key}' should be {wanted}; got {describe(value)}")
        return value

    def verify(self, required: bool = True) -> None:
        """Check the digest over every member (those not read yet are hashed now)."""
        if DIGEST_MEMBER not in self.headers:
            if required:
                raise self.bad("it has no digest member")
            return
        recorded = self.text(DIGEST_MEMBER)
        for key in self.headers:
            if key != DIGEST_MEMBER and key not in self._hashes:
                digest = hashlib.sha256()
                try:
                    with self._zip.open(f"{key}.npy") as fh:
                        while chunk := fh.read(_CHUNK):
                            digest.update(chunk)
                except _PARSE_ERRORS as err:
                    raise self.bad(f"member '{key}' is damaged: {err}") from None
                self._hashes[key] = digest.hexdigest()
        actual = _combine({k: v for k, v in self._hashes.items() if k != DIGEST_MEMBER})
        if actual != recorded:
            raise self.bad("its contents do not match the digest written with them: changed or damaged after writing")


# ----- JSON schema pieces --------------------------------------------------------------------
def is_int(v: Any, minimum: int | None = None) -> bool:
    """A JSON integer (not a bool), at least ``minimum``."""
    return isinstance(v, int) and not isinstance(v, bool) and (minimum is None or v >= minimum)


def is_number(v: Any) -> bool:
    """A JSON number (not a bool)."""
    return isinstance(v, (int, float)) and not isinstance(v, bool)


def is_str_list(v: Any) -> bool:
    return isinstance(v, list) and all(isinstance(s, str) for s in v)


def is_shape(v: Any) -> bool:
    return isinstance(v, list) and len(v) <= 32 and all(is_int(n, 0) for n in v)


def _numeric_array(v: Any) -> bool:
    try:
        arr = np.asarray(v, dtype=float)
    except (TypeError, ValueError, OverflowError):
        return False
    return arr.ndim <= 4


def is_figure(v: Any) -> bool:
    """A history or report value: a number, a text, a bool, None, or a rectangular list of
    numbers (``"nan"`` / ``"inf"`` texts stand for non-finite numbers)."""
    if v is None or isinstance(v, (bool, int, float, str)):
        return True
    return isinstance(v, list) and _numeric_array(v)


def is_report_value(v: Any) -> bool:
    """A stepper's or controller's figure: a number or a rectangular list of numbers."""
    return is_number(v) or (isinstance(v, list) and _numeric_array(v))


def history_problem(items: Any) -> str | None:
    """What is wrong with a history's JSON form (``History.to_json``), or None."""
    if not isinstance(items, list):
        return f"the history should be a list; it is {type(items).__name__}"
    for i, rec in enumerate(items):
        if not isinstance(rec, dict):
            return f"history item {i} should be an object; it is {type(rec).__name__}"
        for k, v in rec.items():
            if not is_figure(v):
                return f"history item {i} field '{k}' is not a number, text or array of numbers"
        if "event" not in rec and "step" in rec and not is_int(rec["step"], 0):
            return f"history item {i} has step {describe(rec['step'])}"
    return None


def committed_step(items: list[dict[str, Any]]) -> int | None:
    """The step of the ensemble a history ends at: the last window record's step, or the
    ``back_to`` of a later roll-back; None for a history without either."""
    for rec in reversed(items):
        if "event" not in rec:
            return rec.get("step")
        if rec.get("event") == "rollback":
            return rec.get("back_to")
    return None


# ----- the result file -----------------------------------------------------------------------
RESULT_STATUSES = ("done", "stopped", "blow-up", "interrupted")


def _parameter_names(v: Any) -> bool:
    if not (is_str_list(v) and v and len(set(v)) == len(v)):
        return False
    have = set(v)
    return not any(".".join(b.split(".")[:i]) in have for b in v for i in range(1, b.count(".") + 1))


def read_result_file(path: Any, fmt: str, versions: tuple[int, ...]) -> dict[str, Any]:
    """Read and check a result file (``Result.save``): the metadata's fields and types,
    the members against the metadata (names, particle count, shapes, dtypes) before any
    array is read, then the arrays and the digest. Returns the metadata with the arrays
    under ``"arrays"`` (by parameter name) and ``"u"``; raises a ``ValueError`` that names
    ``path`` and what is wrong."""
    with Archive(path, "path", "result") as ar:
        meta = ar.meta()
        ar.expect(meta, "format", lambda v: v == fmt, repr(fmt))
        version = ar.expect(meta, "version", lambda v: is_int(v) and v in versions, f"one of {list(versions)}")
        names = ar.expect(meta, "names", _parameter_names, "a list of distinct names, none a dotted prefix of another")
        ar.expect(
            meta,
            "shapes",
            lambda v: isinstance(v, list) and len(v) == len(names) and all(map(is_shape, v)),
            f"a list of {len(names)} shapes",
        )
        ar.expect(meta, "supports", lambda v: is_str_list(v) and len(v) == len(names), f"a list of {len(names)} texts")
        ar.expect(meta, "root_array", lambda v: isinstance(v, bool) and (not v or len(names) == 1), "true or false")
        ar.expect(meta, "status", lambda v: v in RESULT_STATUSES, f"one of {list(RESULT_STATUSES)}")
        for key in ("reason", "stepper"):
            ar.expect(meta, key, lambda v: isinstance(v, str), "a text")
        ar.expect(meta, "steps", lambda v: is_int(v, 0), "a whole number >= 0")
        ar.expect(meta, "elapsed", lambda v: is_number(v) and math.isfinite(v) and v >= 0, "a number of seconds >= 0")
        ar.expect(
            meta,
            "report",
            lambda v: isinstance(v, dict) and all(map(is_report_value, v.values())),
            "an object of numbers and lists of numbers",
        )
        ar.expect(meta, "events", is_str_list, "a list of texts")
        problem = history_problem(meta.get("history"))
        if problem:
            raise ar.bad(problem)
        ar.require_members({"meta", "u"} | {f"p:{n}" for n in names}, optional={DIGEST_MEMBER})
        u_dtype, u_shape = ar.header("u")
        if u_dtype.kind != "f" or len(u_shape) != 2:
            raise ar.bad(f"member 'u' should be an (N, d) float array; it is {u_dtype} of shape {u_shape}")
        n = u_shape[0]
        for name, shape in zip(names, meta["shapes"]):
            dtype, got = ar.header(f"p:{name}")
            if dtype.kind not in "fiub" or got != (n, *shape):
                raise ar.bad(
                    f"member 'p:{name}' should be numbers of shape {(n, *shape)} (N = {n} particles, "
                    f"parameter shape {tuple(shape)} in the metadata); it is {dtype} of shape {got}"
                )
        arrays = {name: ar.array(f"p:{name}") for name in names}
        u = ar.array("u")
        ar.verify(required=version >= 2)
    return {**meta, "arrays": arrays, "u": u}
