"""Files: atomic writes under SIGKILL, shared checkpoint paths, planted symlinks, tampered
and foreign files refused with a clear message, the target's fingerprint, checkpoint paths
checked before the run, and the checkpoint written on an interrupt.

These are checks of file handling, not of sampling: each compares against the file as it
was before (or written by an uninterrupted run), not against a posterior."""

import io
import json
import os
import struct
import subprocess
import sys
import tempfile
import textwrap
import time
import zipfile

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import flowpost as fp
from flowpost.engine._files import atomic_write, temporary_prefix, write_npz


def log_p(x, y):
    return -0.5 * jnp.sum((x - y) ** 2)


Y = jnp.array([1.0, -1.0])
STEPPER = fp.Langevin(step_size=0.1)
KW = {"key": jax.random.key(3), "window": 10, "progress": False}


def _x0():
    return jnp.zeros((8, 2))


def _parts(folder):
    return sorted(f for f in os.listdir(folder) if f.endswith(".part"))


@pytest.fixture(scope="module")
def small(tmp_path_factory):
    """A saved result of 8 one-dimensional particles (to copy, tamper with, save over)."""
    path = tmp_path_factory.mktemp("small") / "small.npz"
    r = fp.run(
        lambda x: -0.5 * jnp.sum(x**2), STEPPER, jnp.ones((8, 1)), key=jax.random.key(0), steps=10, progress=False
    )
    r.save(path)
    return path


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    """A saved result and a checkpoint after 30 steps (windows of 10), and a 60-step run."""
    folder = tmp_path_factory.mktemp("files")
    ck = folder / "ck.npz"
    first = fp.run(fp.Target(log_p, data=Y), STEPPER, _x0(), steps=30, checkpoint=ck, checkpoint_every=1, **KW)
    first.save(folder / "fit.npz")
    full = fp.run(fp.Target(log_p, data=Y), STEPPER, _x0(), steps=60, **KW)
    return {"folder": folder, "ck": ck, "fit": folder / "fit.npz", "first": first, "full": full}


def _members(path):
    """The members of one of our files, read as plain NumPy (the file is our own)."""
    with np.load(path, allow_pickle=False) as f:
        return {k: f[k] for k in f.files}


def _meta(members):
    return json.loads(str(members["meta"]))


# ----- atomic writes ---------------------------------------------------------------------------
KILLER = textwrap.dedent("""
    import json, os, random, signal, sys, time
    import numpy as np
    from flowpost.engine._result import Result, load

    folder, path = sys.argv[1], sys.argv[2]
    old = load(path)
    big = np.random.default_rng(0).standard_normal((30_000, 40))  # two 10 MB members
    new = Result(steps=999, _loaded={"names": ["x"], "shapes": [[40]], "supports": ["real"],
                 "root_array": False, "arrays": {"x": big}, "u": big, "stepper": "big"})
    t0 = time.perf_counter(); new.save(os.path.join(folder, "timing.npz")); save_s = time.perf_counter() - t0
    os.unlink(os.path.join(folder, "timing.npz"))
    rng, out = random.Random(11), []
    for i in range(10):
        old.save(path)
        pid = os.fork()
        if pid == 0:  # the writer: save over the good file until killed
            while True:
                new.save(path)
        time.sleep(rng.uniform(0.2, 1.0) * save_s)
        mid_write = any(f.endswith(".part") for f in os.listdir(folder))
        os.kill(pid, signal.SIGKILL)
        os.waitpid(pid, 0)
        try:
            steps = load(path).steps
        except Exception as err:
            steps = repr(err)
        out.append({"mid_write": mid_write, "steps": steps})
    old.save(path)  # the next write removes the temporaries of killed writers
    print(json.dumps({"kills": out, "left": sorted(f for f in os.listdir(folder) if f.endswith(".part"))}))
""")


def test_sigkill_during_save_leaves_a_readable_file(small, sharer, tmp_path):
    """10 SIGKILLs of a process saving a large result over a good file, each at a random
    moment of the save: the file loads every time (the old result, or the new one when the
    kill came after a complete save), and the temporaries of killed writers are removed by the
    next save. With an in-place write a kill mid-write leaves a truncated file. (``sharer``
    is started here only so that its start-up overlaps this test.)"""
    r = fp.load(small)
    path = tmp_path / "fit.npz"
    r.save(path)
    script = tmp_path / "killer.py"
    script.write_text(KILLER)
    env = {**os.environ, "JAX_PLATFORMS": "cpu"}
    p = subprocess.run(
        [sys.executable, str(script), str(tmp_path), str(path)], capture_output=True, text=True, env=env, timeout=120
    )
    assert p.returncode == 0, p.stderr
    said = json.loads(p.stdout.strip().splitlines()[-1])
    steps = [k["steps"] for k in said["kills"]]
    assert all(s in (r.steps, 999) for s in steps), steps  # 10 of 10 readable
    # most kills landed inside a save (a temporary existed at the kill), so the test can fail
    assert sum(k["mid_write"] for k in said["kills"]) >= 5, said
    assert said["left"] == []


SHARER = textwrap.dedent("""
    import sys
    import jax, jax.numpy as jnp
    import flowpost as fp

    def log_p(x, y):
        return -0.5 * jnp.sum((x - y) ** 2)

    target = fp.Target(log_p, data=jnp.array([-1.0, 1.0]))
    kw = dict(key=jax.random.key(3), window=10, progress=False)
    fp.run(target, fp.Langevin(step_size=0.1), jnp.zeros((8, 2)), steps=10, **kw)  # compile first
    print("ready", flush=True)
    path, steps = sys.stdin.readline().split()
    r = fp.run(target, fp.Langevin(step_size=0.1), jnp.zeros((8, 2)), steps=int(steps), checkpoint=path,
               checkpoint_every=1, **kw)
    print(r.status, r.steps, flush=True)
""")


@pytest.fixture(scope="module")
def sharer(tmp_path_factory):
    """Another process that will run with a checkpoint path it is sent (started early, so that
    its start-up overlaps the tests before the one that uses it)."""
    script = tmp_path_factory.mktemp("sharer") / "sharer.py"
    script.write_text(SHARER)
    env = {**os.environ, "JAX_PLATFORMS": "cpu"}
    child = subprocess.Popen(
        [sys.executable, str(script)],
        stdin=subprocess.PIPE,
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        env=env,
    )
    yield child
    if child.poll() is None:
        child.kill()
        child.wait()


def test_two_runs_sharing_a_checkpoint_path_both_finish(sharer, tmp_path):
    """Two processes writing a checkpoint after every window to one path (each rename
    replaces the file whole): both finish, the file left is one run's final checkpoint
    (whole: it resumes, or is refused only for being the other run's target), and no
    temporary remains."""
    ck, steps = tmp_path / "shared.npz", 600
    assert sharer.stdout.readline().strip() == "ready", sharer.communicate()
    sharer.stdin.write(f"{ck} {steps}\n")
    sharer.stdin.flush()
    deadline = time.monotonic() + 60
    while not ck.exists() and sharer.poll() is None and time.monotonic() < deadline:
        time.sleep(0.01)  # until the other run has written its first checkpoint
    assert sharer.poll() is None, sharer.communicate()
    mine = fp.run(fp.Target(log_p, data=Y), STEPPER, _x0(), steps=steps, checkpoint=ck, checkpoint_every=1, **KW)
    out, err = sharer.communicate(timeout=120)
    assert sharer.returncode == 0, err
    assert out.split() == ["done", str(steps)] and mine.steps == steps
    assert _parts(tmp_path) == []
    assert _meta(_members(ck))["step"] == steps
    try:
        again = fp.run(fp.Target(log_p, data=Y), STEPPER, _x0(), steps=steps, resume=ck, **KW)
    except ValueError as err:  # the other run renamed last: its target (another module's log_p)
        assert "differs in target." in str(err), str(err)
    else:
        np.testing.assert_array_equal(again.unconstrained, mine.unconstrained)


def test_interrupted_write_and_killed_writers_leave_no_temporary(small, tmp_path):
    """An exception or Ctrl-C inside a write removes its temporary and leaves the old file;
    a temporary left by a killed process (its pid gone) is removed by the next check or
    write of that path, one of a live process is not."""
    path = tmp_path / "fit.npz"
    path.write_bytes(small.read_bytes())

    def interrupted(fh):
        fh.write(b"half a file")
        raise KeyboardInterrupt

    with pytest.raises(KeyboardInterrupt):
        atomic_write(path, interrupted)
    assert _parts(tmp_path) == [] and path.read_bytes() == small.read_bytes()
    gone = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True, text=True)
    dead_pid = int(gone.stdout)  # that process has exited and been reaped
    live = temporary_prefix(path) + "livelive.part"
    dead = live.replace(f"-{os.getpid()}.", f"-{dead_pid}.").replace("livelive", "deaddead")
    assert dead != live
    for name in (live, dead):
        (tmp_path / name).write_bytes(b"partial")
    fp.load(path).save(path)
    assert _parts(tmp_path) == [live]


def test_temporaries_never_follow_a_planted_symlink(small, tmp_path, monkeypatch):
    """A symlink planted at the temporary name the writer will try first (pointing at a file
    elsewhere) is skipped (created with O_EXCL), and a symlink at the destination is replaced,
    not written through: the file elsewhere is untouched both times."""
    victim = tmp_path / "elsewhere" / "victim.txt"
    victim.parent.mkdir()
    victim.write_text("precious")
    r = fp.load(small)
    dest = tmp_path / "out" / "fit.npz"
    dest.parent.mkdir()
    planted = dest.parent / f"{temporary_prefix(dest)}aaaaaaaa.part"
    planted.symlink_to(victim)
    # every mkstemp call tries the planted name first
    monkeypatch.setattr(tempfile, "_get_candidate_names", lambda: iter(["aaaaaaaa", "bbbbbbbb"]))
    r.save(dest)
    monkeypatch.undo()
    assert victim.read_text() == "precious"
    assert planted.is_symlink() and os.readlink(planted) == str(victim)
    assert fp.load(dest).steps == r.steps
    dest.unlink()
    dest.symlink_to(victim)
    r.save(dest)
    assert victim.read_text() == "precious" and not dest.is_symlink()
    assert fp.load(dest).steps == r.steps
    assert [f for f in _parts(dest.parent) if f != planted.name] == []


# ----- tampered and foreign files --------------------------------------------------------------
def _rewrite(members, **changes):
    """The members with ``changes`` (None drops one), written with a fresh digest."""
    out = {k: (str(v) if k == "meta" else v) for k, v in members.items() if k != "digest"}
    for k, v in changes.items():
        if v is None:
            out.pop(k, None)
        else:
            out[k] = v
    return out


def _with_meta(members, **fields):
    meta = _meta(members)
    meta.update(fields)
    return _rewrite(members, meta=json.dumps(meta))


def _write(path, arrays, digest=True):
    if digest:
        with open(path, "wb") as fh:
            write_npz(fh, arrays)
    else:  # as a hand edit would: np.savez, the old digest kept
        np.savez(path, **arrays)


def _zip(path, members, forge=None):
    """The members as a zip written by hand (stored, valid CRCs); ``forge`` edits the bytes
    of one member's .npy form first."""
    with zipfile.ZipFile(path, "w", zipfile.ZIP_STORED) as zf:
        for k, v in _rewrite(members).items():
            buf = io.BytesIO()
            np.lib.format.write_array(buf, np.asarray(v), allow_pickle=False)
            raw = buf.getvalue()
            zf.writestr(f"{k}.npy", forge(k, raw) if forge else raw)


def _huge_header(path, members):
    """A member whose .npy header claims 10^12 float32 values (4 TB) in 32 bytes (NumPy pads
    headers with spaces, so the forged text fits; the CRC is the forged bytes' own)."""

    def forge(k, raw):
        if k != "u":
            return raw
        start, end = raw.index(b"{"), raw.index(b"\n")
        forged = b"{'descr': '<f4', 'fortran_order': False, 'shape': (1000000000000,), }"
        return raw[:start] + forged.ljust(end - start) + raw[end:]

    _zip(path, members, forge)


def _huge_zip_size(path, members):
    """A central-directory entry claiming a 4 GB member (the bytes stored are small)."""
    _zip(path, members)
    raw = bytearray(path.read_bytes())
    at = raw.find(b"PK\x01\x02")  # first central-directory entry: uncompressed size at +24
    raw[at + 24 : at + 28] = struct.pack("<I", 0xFFFFFFF0)
    path.write_bytes(bytes(raw))


def _nested(depth):
    return json.loads("[" * depth + "]" * depth)


def _encrypted(path, members):
    """A member flagged as encrypted in the central directory."""
    _zip(path, members)
    raw = bytearray(path.read_bytes())
    at = raw.find(b"PK\x01\x02")  # general-purpose flags at +8
    raw[at + 8] |= 0x1
    path.write_bytes(bytes(raw))


RESULT_CASES = {
    # name: (make(path, members), fragment of the message)
    "steps of the wrong type": (lambda p, m: _write(p, _with_meta(m, steps="many")), "metadata 'steps' should be"),
    "names of the wrong type": (lambda p, m: _write(p, _with_meta(m, names=5)), "metadata 'names' should be"),
    "status unknown": (lambda p, m: _write(p, _with_meta(m, status="great")), "metadata 'status' should be"),
    "history of the wrong type": (lambda p, m: _write(p, _with_meta(m, history={"a": 1})), "history should be a list"),
    "deeply nested JSON (parser limit)": (
        lambda p, m: _write(p, _rewrite(m, meta='{"h": ' + "[" * 100_000 + "]" * 100_000 + "}")),
        "nested too deeply",
    ),
    "nested JSON past the depth limit": (
        lambda p, m: _write(p, _with_meta(m, report={"r": _nested(60)})),
        "nested deeper than 32",
    ),
    "metadata not JSON": (lambda p, m: _write(p, _rewrite(m, meta="{not json")), "metadata is not JSON"),
    "metadata not an object": (lambda p, m: _write(p, _rewrite(m, meta="[1, 2]")), "should be a JSON object"),
    "shapes disagree with the arrays": (
        lambda p, m: _write(p, _with_meta(m, shapes=[[3]])),
        "member 'p:theta' should be numbers of shape (8, 3)",
    ),
    "particle count disagrees": (
        lambda p, m: _write(p, _rewrite(m, u=m["u"][:4])),
        "member 'p:theta' should be numbers of shape (4, 1)",
    ),
    "a member missing": (lambda p, m: _write(p, _rewrite(m, u=None)), "missing member(s) ['u']"),
    "a member of Python objects": (
        lambda p, m: np.savez(p, **{**_rewrite(m), "u": np.array([{"a": 1}], dtype=object)}),
        "holds Python objects",
    ),
    "a header claiming 8 TB": (_huge_header, "claims shape (1000000000000,)"),
    "a zip entry claiming 4 GB": (_huge_zip_size, "claims 4294967280 bytes"),
    "an encrypted member": (_encrypted, "member 'meta' is encrypted"),
    "report of the wrong type": (lambda p, m: _write(p, _with_meta(m, report={"h": "big"})), "metadata 'report'"),
    "names clashing as a tree": (
        lambda p, m: _write(p, _with_meta(m, names=["a", "a.b"], shapes=[[1], [1]], supports=["real", "real"])),
        "metadata 'names' should be a list of distinct names, none a dotted prefix",
    ),
    "hand-edited metadata (digest kept)": (
        lambda p, m: _write(p, {**_with_meta(m, steps=5), "digest": m["digest"]}, digest=False),
        "do not match the digest",
    ),
    "a flipped byte": (None, "damaged"),
    "truncated": (None, "not an .npz archive"),
    "a text file": (lambda p, m: p.write_text("hello"), "not an .npz archive"),
    "another program's npz": (lambda p, m: np.savez(p, a=np.arange(3)), "missing member"),
    "another format's metadata": (
        lambda p, m: _write(p, _with_meta(m, format="something-else")),
        "metadata 'format' should be 'flowpost-result'",
    ),
}


@pytest.mark.parametrize("case", sorted(RESULT_CASES))
def test_tampered_or_foreign_result_refused(case, small, tmp_path):
    good = small
    members = _members(good)
    path = tmp_path / "bad.npz"
    make, fragment = RESULT_CASES[case]
    raw = good.read_bytes()
    if case == "a flipped byte":  # inside the 'u' member's numbers (the first member holding them)
        at = raw.find(members["u"].tobytes()) + 3
        path.write_bytes(raw[:at] + bytes([raw[at] ^ 0xFF]) + raw[at + 1 :])
    elif case == "truncated":
        path.write_bytes(raw[: len(raw) // 2])
    else:
        make(path, members)
    with pytest.raises(ValueError) as info:
        fp.load(path)
    text = str(info.value)
    assert text.startswith(f"path: expected a flowpost result file; got '{path}'"), text
    assert "not a readable flowpost result file" in text and fragment in text, text


def test_load_names_a_missing_file_a_folder_and_a_non_path(tmp_path):
    with pytest.raises(FileNotFoundError, match=r"path: expected an existing flowpost result file; got '.*nothing"):
        fp.load(tmp_path / "nothing.npz")
    with pytest.raises(ValueError, match=r"path: .*which is not a readable flowpost result file \(it is a folder\)"):
        fp.load(tmp_path)
    with pytest.raises(TypeError, match=r"path: expected a file path \(str or os.PathLike\); got 12"):
        fp.load(12)  # type: ignore[arg-type]


def test_a_version_1_result_still_loads(small, tmp_path):
    """Files written before the digest (format version 1: np.savez, no digest) load."""
    members = _members(small)
    meta = {**_meta(members), "version": 1}
    old = tmp_path / "v1.npz"
    np.savez(old, **{**_rewrite(members), "meta": np.array(json.dumps(meta))})
    np.testing.assert_array_equal(fp.load(old).unconstrained, members["u"])


# ----- checkpoints -----------------------------------------------------------------------------
def _resume(path, y=Y, fn=log_p, steps=60):
    return fp.run(fp.Target(fn, data=y), STEPPER, _x0(), steps=steps, resume=path, **KW)


def test_checkpoint_of_another_target_of_the_same_shape_refused(files):
    """Same shapes, other data, or another log-density: refused, naming what differs."""
    with pytest.raises(ValueError, match=r"resume: expected a checkpoint of this run's .*target\.data\[0\]"):
        _resume(files["ck"], y=Y + 0.5)

    def log_p(x, y):  # the same name, another density
        return -0.5 * jnp.sum((x - 2 * y) ** 2)

    with pytest.raises(ValueError, match=r"target\.log_p\['total'\]"):
        _resume(files["ck"], fn=log_p)
    np.testing.assert_array_equal(_resume(files["ck"]).unconstrained, files["full"].unconstrained)


def _checkpoint_cases(members):
    meta = _meta(members)
    return {
        "step count tampered (digest kept)": (
            {**_with_meta(members, step=20), "digest": members["digest"]},
            False,
            "do not match the digest",
        ),
        "step count disagreeing with the history": (
            _with_meta(members, step=20),
            True,
            "metadata 'step' is 20 but its history ends at step 30",
        ),
        "step of the wrong type": (_with_meta(members, step="30"), True, "metadata 'step' should be"),
        "a leaf of another shape": (
            _rewrite(members, leaf_0=np.zeros((4, 2), members["leaf_0"].dtype)),
            True,
            "member 'leaf_0' is float32 of shape (4, 2); the metadata says float32 of shape (8, 2)",
        ),
        "a leaf count beyond the members": (
            _with_meta(members, n_leaves=meta["n_leaves"] + 1, shapes=[*meta["shapes"], ["float32", []]]),
            True,
            f"missing member(s) ['leaf_{meta['n_leaves']}']",
        ),
        "nested JSON past the depth limit": (
            _with_meta(members, identity={"stepper": _nested(40), "controller": 0, "target": 0}),
            True,
            "nested deeper than 32",
        ),
        "no digest": (_rewrite(members), False, "missing member(s) ['digest']"),
    }


def test_tampered_checkpoints_refused(files, tmp_path):
    """Each kind of tampering is refused before anything is resumed: the message names
    resume, the path and what is wrong."""
    members = _members(files["ck"])
    for case, (arrays, digest, fragment) in _checkpoint_cases(members).items():
        path = tmp_path / "bad.npz"
        _write(path, arrays, digest=digest)
        with pytest.raises(ValueError) as info:
            _resume(path)
        text = str(info.value)
        assert text.startswith(f"resume: expected a flowpost checkpoint file; got '{path}'"), (case, text)
        assert "not a readable flowpost checkpoint file" in text and fragment in text, (case, text)
    raw = files["ck"].read_bytes()
    path.write_bytes(raw[: len(raw) - 100])
    with pytest.raises(ValueError, match="not a readable flowpost checkpoint file"):
        _resume(path)


def _never_called(x):
    raise AssertionError("log_p was called: the run started before the checkpoint path was checked")


@pytest.mark.parametrize("case", ["missing folder", "a folder", "inside a file", "unwritable folder", "not a path"])
def test_checkpoint_path_checked_before_the_run(case, tmp_path):
    (tmp_path / "file.txt").write_text("x")
    path, kind, fragment = {
        "missing folder": (tmp_path / "nowhere" / "ck.npz", ValueError, "in an existing folder"),
        "a folder": (tmp_path, ValueError, "which is a folder"),
        "inside a file": (tmp_path / "file.txt" / "ck.npz", ValueError, "is not a folder"),
        "unwritable folder": (None, ValueError, "a folder this process can write to"),
        "not a path": (3.5, TypeError, "a file path (str or os.PathLike)"),
    }[case]
    if case == "unwritable folder":
        if os.geteuid() == 0:  # root writes anywhere a mode allows nothing; /sys refuses even root
            path = "/sys/ck.npz"
        else:
            locked = tmp_path / "locked"
            locked.mkdir(mode=0o500)
            path = locked / "ck.npz"
    with pytest.raises(kind) as info:
        fp.run(_never_called, STEPPER, _x0(), key=jax.random.key(0), steps=10, progress=False, checkpoint=path)
    assert str(info.value).startswith("checkpoint: expected") and fragment in str(info.value), str(info.value)


class _CtrlC(fp.Monitor):
    """Presses Ctrl-C while judging window ``at``: after that window's record is appended to
    the history, before the window is committed."""

    def __init__(self, at):
        super().__init__()
        self.at, self.seen = at, 0

    def judge(self, history):
        self.seen += 1
        if self.seen == self.at:
            raise KeyboardInterrupt
        return super().judge(history)


def test_interrupt_writes_a_final_checkpoint_of_the_committed_ensemble(files, tmp_path):
    """Ctrl-C between window 3's record and its commit: the result and the final checkpoint
    hold the ensemble after window 2 and a history of 2 records (none for the discarded
    window), and resuming from it ends exactly where an uninterrupted run does."""
    ck = tmp_path / "ck.npz"
    r = fp.run(
        fp.Target(log_p, data=Y), STEPPER, _x0(), steps=60, monitor=_CtrlC(3), checkpoint=ck, checkpoint_every=5, **KW
    )
    assert r.status == "interrupted" and r.steps == 20
    assert [rec["step"] for rec in r.history] == [10, 20]
    meta = _meta(_members(ck))
    assert meta["step"] == 20 and [rec["step"] for rec in meta["history"]] == [10, 20]
    again = _resume(ck)
    np.testing.assert_array_equal(again.unconstrained, files["full"].unconstrained)
    assert [rec["step"] for rec in again.history] == [rec["step"] for rec in files["full"].history]
    assert _parts(tmp_path) == []
