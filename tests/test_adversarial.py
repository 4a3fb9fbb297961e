"""Adversarial cases: what a careless or hostile user, a full disk or a killed process can do.

Every case checks the job against something outside peaksift: the bytes of the user's own
files, the file modes the operating system gives under a umask, the process table after a
``kill -9``, the exit status and the one-line message, numpy sums of the weights written
here, and scipy's chi-square survival function for the goodness of fit.  Sized for CI: the
data sets are a few thousand events and the searches run without toys or limits unless the
case needs them.  64 numbered cases (each test's docstring says which), the clean
neighbours of the refused ones among them.
"""

from __future__ import annotations

import errno
import json
import os
import signal
import stat
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import numpy as np
import pytest

import peaksift
from peaksift.cli import main

pa = pytest.importorskip("pyarrow")
pq = pytest.importorskip("pyarrow.parquet")

SRC = Path(__file__).resolve().parents[1] / "src"
MANIFEST = "peaksift-manifest.json"


# ----------------------------------------------------------------------------- helpers
def _muons(masses: np.ndarray) -> pa.Array:
    """Two back-to-back massless muons per event with pT = m/2 at eta = 0: their invariant
    mass is exactly m (E = |p| = m/2 each, momenta opposite)."""
    m = np.asarray(masses, float)
    n = m.size
    pt = np.repeat(m / 2.0, 2)
    phi = np.tile([0.0, np.pi], n)
    charge = np.tile(np.array([1, -1], np.int8), n)
    st = pa.StructArray.from_arrays(
        [pa.array(pt), pa.array(np.zeros(2 * n)), pa.array(phi), pa.array(np.zeros(2 * n)),
         pa.array(charge)], names=["pt", "eta", "phi", "mass", "charge"])
    return pa.ListArray.from_arrays(pa.array(np.arange(0, 2 * n + 1, 2, dtype=np.int32)), st)


def _write_data(d: Path, masses, weight=None, name: str = "ev.parquet") -> Path:
    d.mkdir(parents=True, exist_ok=True)
    cols = {"muon": _muons(np.asarray(masses, float))}
    if weight is not None:
        cols["weight"] = weight
    pq.write_table(pa.table(cols), d / name)
    return d / name


def _config(d: Path, extra: str = "", *, weights: bool = True, bins: int = 50,
            resolution: str = "absolute = 2.0", files: str = '"ev.parquet"') -> Path:
    p = d / "c.toml"
    p.write_text(textwrap.dedent(f"""\
        [input]
        files = [{files}]
        weights = {'true' if weights else 'false'}
        [objects]
        collection = "muon"
        cut = "pt > 1"
        [spectrum]
        window = [100.0, 200.0]
        bins = {bins}
        [model]
        background = "exponential"
        [model.resolution]
        {resolution}
        [significance]
        toys = 0
        [limits]
        enabled = false
        [output]
        formats = ["png"]
        """) + extra)
    return p


def _background(n: int = 3000, seed: int = 3) -> np.ndarray:
    rng = np.random.default_rng(seed)
    m = 100.0 + rng.exponential(40.0, n)
    return m[m < 200.0]


@pytest.fixture(scope="module")
def data(tmp_path_factory) -> Path:
    """A falling exponential continuum on [100, 200] GeV, about 2800 events."""
    d = tmp_path_factory.mktemp("adv_data")
    _write_data(d, _background())
    _config(d)
    return d


def _run(capsys, argv):
    rc = main([str(a) for a in argv])
    cap = capsys.readouterr()
    return rc, cap.out, cap.err


def _one_line(err: str) -> str:
    lines = [x for x in err.splitlines() if x.strip()]
    assert len(lines) == 1, err
    assert lines[0].startswith("peaksift: error: ")
    assert "Traceback" not in err
    return lines[0]


def _snapshot(folder: Path) -> dict[str, bytes]:
    """Every file under ``folder`` (relative name -> bytes)."""
    return {p.relative_to(folder).as_posix(): p.read_bytes()
            for p in sorted(folder.rglob("*")) if p.is_file()}


def _no_staging(folder: Path) -> None:
    if folder.exists():
        assert not list(folder.glob(".peaksift-staging-*")), list(folder.iterdir())


def _user_folder(root: Path) -> dict[str, bytes]:
    """A folder of a user's own files, including one named like a peaksift output."""
    (root / "thesis").mkdir(parents=True)
    (root / "my_notes.txt").write_text("keep me\n")
    (root / "thesis" / "chapter1.tex").write_text("\\chapter{One}\n")
    (root / "analysis.py").write_text("print('mine')\n")
    (root / "results.json").write_text('{"mine": true}\n')
    return _snapshot(root)


# ------------------------------------------------------------------ output contract
def test_out_with_foreign_files_is_refused_and_untouched(data, capsys, tmp_path):
    """Case 1: a folder holding a user's files (and a results.json of theirs) is refused
    before the run; every byte stays."""
    out = tmp_path / "work"
    before = _user_folder(out)
    for cmd in (["spectrum"], ["search"]):
        rc, _, err = _run(capsys, [*cmd, data / "c.toml", "--out", out, "--quiet"])
        line = _one_line(err)
        assert rc == 2 and "peaksift did not write" in line and "--share-folder" in line
        assert _snapshot(out) == before
        _no_staging(out)


def test_out_pointing_at_the_input_folder_never_touches_it(capsys, tmp_path):
    """Case 2: --out = the input folder (which also holds a results.json) is refused; the
    Parquet file just read is intact."""
    d = tmp_path / "in"
    _write_data(d, _background())
    cfg = _config(d)
    (d / "results.json").write_text("{}")
    before = _snapshot(d)
    rc, _, err = _run(capsys, ["spectrum", cfg, "--out", d, "--quiet"])
    assert rc == 2 and "ev.parquet" in _one_line(err)
    assert _snapshot(d) == before


def test_share_folder_writes_only_its_own_files(data, capsys, tmp_path):
    """Case 3: with --share-folder the run writes beside the user's files; the manifest
    lists exactly the files that were not there before."""
    out = tmp_path / "shared"
    before = _user_folder(out)
    (out / "results.json").unlink()  # no clash for this case
    del before["results.json"]
    rc, _, err = _run(capsys, ["spectrum", data / "c.toml", "--out", out, "--quiet",
                               "--share-folder"])
    assert rc == 0, err
    after = _snapshot(out)
    assert {k: after[k] for k in before} == before
    listed = set(json.loads((out / MANIFEST).read_text())["files"])
    assert listed == set(after) - set(before) - {MANIFEST}
    assert "spectrum.json" in listed and "figures/spectrum.png" in listed
    _no_staging(out)


def test_share_folder_never_replaces_a_foreign_file_of_our_name(data, capsys, tmp_path):
    """Case 4: a user's results.json is not replaced even with --share-folder; case 5: nor
    is a file in the figures/ folder peaksift would write into."""
    out = tmp_path / "clash"
    before = _user_folder(out)
    rc, _, err = _run(capsys, ["search", data / "c.toml", "--out", out, "--share-folder",
                               "--quiet"])
    assert rc == 2 and "results.json would be replaced" in _one_line(err)
    assert _snapshot(out) == before
    figs = tmp_path / "figs"
    (figs / "figures").mkdir(parents=True)
    (figs / "figures" / "spectrum.png").write_bytes(b"my plot")
    rc, _, err = _run(capsys, ["spectrum", data / "c.toml", "--out", figs, "--share-folder",
                               "--quiet"])
    assert rc == 2 and "figures/spectrum.png" in _one_line(err)
    assert (figs / "figures" / "spectrum.png").read_bytes() == b"my plot"


def test_rerun_replaces_exactly_its_own_files(data, capsys, tmp_path):
    """Case 6: a rerun replaces its files and removes its own file it no longer writes (a
    dropped figure format); a file the user added afterwards makes the rerun refuse unless
    shared, and is kept either way."""
    cfg_dir = tmp_path / "cfg"
    cfg_dir.mkdir()
    both = _config(cfg_dir, files=f'"{data / "ev.parquet"}"').read_text().replace(
        'formats = ["png"]', 'formats = ["png", "pdf"]')
    (cfg_dir / "c.toml").write_text(both)
    out = tmp_path / "mine"
    assert main(["spectrum", str(cfg_dir / "c.toml"), "--out", str(out), "--quiet"]) == 0
    assert (out / "figures" / "spectrum.pdf").read_bytes()[:5] == b"%PDF-"  # asked: written
    (cfg_dir / "c.toml").write_text(both.replace('["png", "pdf"]', '["png"]'))
    assert main(["spectrum", str(cfg_dir / "c.toml"), "--out", str(out), "--quiet"]) == 0
    assert not (out / "figures" / "spectrum.pdf").exists()  # ours, stale: removed
    assert "figures/spectrum.pdf" not in json.loads((out / MANIFEST).read_text())["files"]
    (out / "notes.txt").write_text("added later")
    capsys.readouterr()
    rc, _, err = _run(capsys, ["spectrum", cfg_dir / "c.toml", "--out", out, "--quiet"])
    assert rc == 2 and "notes.txt" in _one_line(err)
    assert main(["spectrum", str(cfg_dir / "c.toml"), "--out", str(out), "--quiet",
                 "--share-folder"]) == 0
    assert (out / "notes.txt").read_text() == "added later"


def test_demo_refuses_a_users_events_file(capsys, tmp_path):
    """Case 7: `peaksift demo DIR` into a folder holding the user's events_000.parquet is
    refused (it used to be overwritten)."""
    d = tmp_path / "d"
    d.mkdir()
    (d / "events_000.parquet").write_bytes(b"the user's own data")
    rc, _, err = _run(capsys, ["demo", d, "--events", "500"])
    assert rc == 2 and "events_000.parquet" in _one_line(err)
    assert (d / "events_000.parquet").read_bytes() == b"the user's own data"
    assert sorted(p.name for p in d.iterdir()) == ["events_000.parquet"]


def test_demo_rerun_replaces_only_demo_files(capsys, tmp_path):
    """Case 8: a demo rerun replaces its own files; a shared folder's other Parquet file
    (which the old glob clean-up would have deleted) is kept."""
    from peaksift.simulate import write_demo

    d = tmp_path / "d"
    write_demo(d, n_events=600, files=3)
    assert (d / "events_002.parquet").exists()
    (d / "events_005.parquet").write_bytes(b"mine")
    write_demo(d, n_events=600, files=2, share_folder=True)
    names = sorted(p.name for p in d.iterdir())
    assert names == ["events_000.parquet", "events_001.parquet", "events_005.parquet",
                     MANIFEST, "truth.json"]
    assert (d / "events_005.parquet").read_bytes() == b"mine"
    # the demo's own search.toml (written by the command) is listed too
    capsys.readouterr()
    assert main(["demo", str(d), "--events", "600", "--share-folder"]) == 0
    assert "search.toml" in json.loads((d / MANIFEST).read_text())["files"]


def test_out_that_is_a_file_or_has_a_folder_in_our_place(data, capsys, tmp_path):
    """Case 9: --out naming a file; case 10: a folder where spectrum.json goes."""
    f = tmp_path / "a_file"
    f.write_text("x")
    rc, _, err = _run(capsys, ["spectrum", data / "c.toml", "--out", f])
    assert rc == 2 and "not a folder" in _one_line(err) and f.read_text() == "x"
    out = tmp_path / "o"
    (out / "spectrum.json").mkdir(parents=True)
    rc, _, err = _run(capsys, ["spectrum", data / "c.toml", "--out", out, "--share-folder"])
    assert rc == 2 and "a folder of that name is in the way" in _one_line(err)


def test_unreadable_manifest_counts_every_file_as_foreign(data, capsys, tmp_path):
    """Case 11: a damaged manifest does not let peaksift claim files."""
    out = tmp_path / "o"
    assert main(["spectrum", str(data / "c.toml"), "--out", str(out), "--quiet"]) == 0
    (out / MANIFEST).write_text("{ not json")
    before = _snapshot(out)
    capsys.readouterr()
    rc, _, err = _run(capsys, ["spectrum", data / "c.toml", "--out", out, "--quiet"])
    assert rc == 2 and "peaksift-manifest.json cannot be read" in _one_line(err)
    assert _snapshot(out) == before


@pytest.mark.parametrize("mask, mode", [(0o022, 0o644), (0o027, 0o640)])
def test_outputs_get_the_users_umask(data, capsys, tmp_path, mask, mode):
    """Cases 12-13: every file a run writes has mode 0o666 & ~umask (what `open` gives),
    not mkstemp's 0o600."""
    out = tmp_path / "o"
    old = os.umask(mask)
    try:
        assert main(["spectrum", str(data / "c.toml"), "--out", str(out), "--quiet"]) == 0
        from peaksift.simulate import write_demo

        write_demo(tmp_path / "demo", n_events=300)
    finally:
        os.umask(old)
    files = [p for p in [*out.rglob("*"), *(tmp_path / "demo").rglob("*")] if p.is_file()]
    assert len(files) >= 6
    for p in files:
        assert stat.S_IMODE(p.stat().st_mode) == mode, p


def test_stale_staging_of_a_dead_run_is_cleaned(data, capsys, tmp_path):
    """Case 14: a staging folder left by a killed run (its process is gone) is removed by
    the next run into the same place; case 15: one whose process still lives is reported
    and the run refused, touching nothing."""
    import socket

    out = tmp_path / "o"
    assert main(["spectrum", str(data / "c.toml"), "--out", str(out), "--quiet"]) == 0
    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()
    stale = out / f".peaksift-staging-{dead.pid}-deadbeef"
    stale.mkdir()
    (stale / ".owner.json").write_text(json.dumps({"host": socket.gethostname(),
                                                   "pid": dead.pid}))
    (stale / "results.json").write_text("half")
    assert main(["spectrum", str(data / "c.toml"), "--out", str(out), "--quiet"]) == 0
    assert not stale.exists()
    alive = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(60)"])
    try:
        busy = out / f".peaksift-staging-{alive.pid}-cafef00d"
        busy.mkdir()
        (busy / ".owner.json").write_text(json.dumps({"host": socket.gethostname(),
                                                      "pid": alive.pid}))
        before = _snapshot(out)
        capsys.readouterr()
        rc, _, err = _run(capsys, ["spectrum", data / "c.toml", "--out", out, "--quiet"])
        assert rc == 2 and f"process {alive.pid} on this machine still runs" in _one_line(err)
        assert _snapshot(out) == before
    finally:
        alive.kill()
        alive.wait()


def test_failed_run_leaves_nothing(capsys, tmp_path):
    """Case 16: a run that fails after the output folder was prepared (no candidates in
    the window) removes its staging and the folder it created."""
    d = tmp_path / "d"
    _write_data(d, np.full(50, 50.0))  # all below the window
    out = tmp_path / "new" / "deeper"
    rc, _, err = _run(capsys, ["search", _config(d), "--out", out, "--quiet"])
    assert rc == 2 and "no candidates in the fit window" in _one_line(err)
    assert not (tmp_path / "new").exists()


# ---------------------------------------------------------------- output-side errors
def test_full_disk_one_line_and_staging_removed(data, capsys, tmp_path, monkeypatch):
    """Case 17: ENOSPC while writing (the system names no file): one line with the
    system's reason, exit 2, staging removed, the folder this run created removed."""
    import peaksift._files as files

    real = files.tempfile.mkstemp
    calls = {"n": 0}

    def full(*a, **k):
        calls["n"] += 1
        if calls["n"] > 1:  # the staging marker goes through; the outputs do not
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
        return real(*a, **k)

    monkeypatch.setattr(files.tempfile, "mkstemp", full)
    out = tmp_path / "o"
    rc, _, err = _run(capsys, ["spectrum", data / "c.toml", "--out", out, "--quiet"])
    line = _one_line(err)
    assert rc == 2 and "No space left on device" in line and str(out) in line
    assert not out.exists()


def test_read_only_output_refused_before_the_run(data, capsys, tmp_path, monkeypatch):
    """Case 18: a read-only file system refuses the staging marker: one line naming the
    folder and the reason, before any event is read; case 19: a folder without write
    permission is refused by its access check."""
    import peaksift._output as output
    from peaksift import execution

    def ro(path, data):
        raise OSError(errno.EROFS, os.strerror(errno.EROFS), str(path))

    def never(*a, **k):
        raise AssertionError("events were read before the output folder was checked")

    monkeypatch.setattr(output, "atomic_write", ro)
    monkeypatch.setattr(execution, "collect", never)
    out = tmp_path / "o"
    out.mkdir()
    rc, _, err = _run(capsys, ["spectrum", data / "c.toml", "--out", out, "--quiet"])
    line = _one_line(err)
    assert rc == 2 and "Read-only file system" in line and str(out) in line
    assert list(out.iterdir()) == []
    monkeypatch.setattr(output.os, "access", lambda *a, **k: False)
    rc, _, err = _run(capsys, ["spectrum", data / "c.toml", "--out", out, "--quiet"])
    assert rc == 2 and "is not writable" in _one_line(err)


def test_rename_refused_by_the_system(data, capsys, tmp_path, monkeypatch):
    """Case 20: the final move fails (EXDEV/EBUSY from the system): one line with the path
    and reason, exit 2, staging removed; the earlier result stays readable."""
    import peaksift._output as output

    out = tmp_path / "o"
    assert main(["spectrum", str(data / "c.toml"), "--out", str(out), "--quiet"]) == 0
    before = json.loads((out / "spectrum.json").read_text())

    def refuse(src, dst):
        raise OSError(errno.EBUSY, os.strerror(errno.EBUSY), str(dst))

    monkeypatch.setattr(output.os, "replace", refuse)
    capsys.readouterr()
    rc, _, err = _run(capsys, ["spectrum", data / "c.toml", "--out", out, "--quiet"])
    line = _one_line(err)
    assert rc == 2 and "Device or resource busy" in line and str(out) in line
    _no_staging(out)
    assert json.loads((out / "spectrum.json").read_text()) == before


# ------------------------------------------------------------------------- signals
_ORPHAN_SCRIPT = """
import os, sys, time
sys.path.insert(0, {src!r})
from peaksift.execution import map_tasks
D = sys.argv[1]
def task(i):
    open(os.path.join(D, "w%d" % os.getpid()), "w").close()
    time.sleep(120)
    return i
if __name__ == "__main__":
    engine, method = sys.argv[2].split("-")
    map_tasks(task, list(range(6)), engine=engine, workers=3 if engine == "processes" else 2,
              start_method=method)
"""


def _gone(pid: int) -> bool:
    """No such process, or a zombie (dead, waiting for its new parent to collect it)."""
    try:
        with open(f"/proc/{pid}/stat") as f:
            return f.read().rsplit(")", 1)[1].split()[0] == "Z"
    except FileNotFoundError:
        return True


def _children(pid: int) -> set[int]:
    out = set()
    for p in Path("/proc").iterdir():
        if p.name.isdigit():
            try:
                if int((p / "stat").read_text().rsplit(")", 1)[1].split()[1]) == pid:
                    out.add(int(p.name))
            except (OSError, IndexError, ValueError):
                pass
    return out


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="reads /proc")
@pytest.mark.parametrize("method", ["processes-fork", "processes-spawn", "dask-auto"])
def test_workers_die_with_a_killed_parent(tmp_path, method):
    """Cases 21-23: `kill -9` of the parent: every pool worker (local process pool, forked
    or spawned; a local Dask cluster's workers) is gone within 5 s (before the fix the
    process pool's workers lived on, blocked on their task pipe)."""
    if method.startswith("dask"):
        pytest.importorskip("distributed")
    script = tmp_path / "parent.py"
    script.write_text(_ORPHAN_SCRIPT.format(src=str(SRC)))
    marks = tmp_path / "marks"
    marks.mkdir()
    parent = subprocess.Popen([sys.executable, str(script), str(marks), method])
    try:
        deadline = time.monotonic() + 180  # generous: start-up on a loaded machine
        while time.monotonic() < deadline:
            pids = {int(p.name[1:]) for p in marks.iterdir()} - {parent.pid}
            if len(pids) >= 2:
                break
            time.sleep(0.1)
        assert len(pids) >= 2, "the workers did not start"
        os.kill(parent.pid, signal.SIGKILL)
        parent.wait()
        deadline = time.monotonic() + 5
        while time.monotonic() < deadline and not all(_gone(p) for p in pids):
            time.sleep(0.1)
        left = [p for p in pids if not _gone(p)]
        assert not left, f"workers outlived their parent: {left}"
    finally:
        for p in {int(x.name[1:]) for x in marks.iterdir()}:
            try:
                os.kill(p, signal.SIGKILL)
            except ProcessLookupError:
                pass


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="reads /proc")
@pytest.mark.parametrize("engine", ["serial", "processes"])
def test_sigterm_is_handled_like_ctrl_c(data, tmp_path, engine):
    """Cases 24-25: SIGTERM during a search (toys running in this process, or in worker
    processes): one line, exit 143, staging removed, the output folder this run created
    removed, no worker left."""
    cfg = tmp_path / "c.toml"
    cfg.write_text((data / "c.toml").read_text().replace(
        '"ev.parquet"', json.dumps(str(data / "ev.parquet"))).replace(
        "toys = 0", "toys = 1000000") + f'[execution]\nengine = "{engine}"\nworkers = 2\n')
    out = tmp_path / "o"
    env = {**os.environ, "PYTHONPATH": str(SRC)}
    proc = subprocess.Popen([sys.executable, "-m", "peaksift.cli", "search", str(cfg), "--out",
                             str(out), "--quiet"], env=env, stderr=subprocess.PIPE, text=True)
    workers: set[int] = set()
    try:
        deadline = time.monotonic() + 180  # generous: start-up on a loaded 2-core machine
        while time.monotonic() < deadline and not list(out.glob(".peaksift-staging-*")):
            assert proc.poll() is None, proc.communicate()[1]
            time.sleep(0.05)
        assert list(out.glob(".peaksift-staging-*")), "the run never started writing"
        if engine == "processes":  # wait for the workers (reading, then toys)
            while time.monotonic() < deadline and not workers:
                assert proc.poll() is None, proc.communicate()[1]
                time.sleep(0.1)
                workers = _children(proc.pid)
            assert workers, "no worker processes started"
        time.sleep(1.0)  # into the run
        workers |= _children(proc.pid)
        proc.send_signal(signal.SIGTERM)
        _, err = proc.communicate(timeout=60)
    finally:
        # a failed wait must not leave a million-toy search running after the test
        if proc.poll() is None:
            proc.kill()
            proc.communicate()
    assert proc.returncode == 143, err
    lines = [x for x in err.splitlines() if x.strip()]
    assert lines == [("peaksift: terminated (SIGTERM); the run's unfinished outputs were "
                      "removed")], err
    assert not out.exists()
    deadline = time.monotonic() + 5  # a helper such as multiprocessing's resource tracker
    while time.monotonic() < deadline and not all(_gone(p) for p in workers):  # ends after
        time.sleep(0.1)
    assert all(_gone(p) for p in workers)


# ------------------------------------------------------------- validation of the work
def _load(d: Path, extra: str = "", **kw):
    return peaksift.load_config(_config(d, extra, **kw))


@pytest.mark.parametrize("resolution, extra, key", [
    ("absolute = 1e-9", "", "model.resolution"),                              # 26
    ("table = [[90.0, 1e-7], [210.0, 1e-7]]", "", "model.resolution"),        # 27
    ("absolute = 2.0", "[scan]\nstep = 1e-12\n", "scan.step"),                # 28
    ("absolute = 2.0\nnatural_width = 1e6", "", "model.resolution.natural_width"),  # 29
    ("absolute = 500.0", "", "model.resolution.absolute"),                    # 30
    ("absolute = 2.0", "[scan]\npoints = 100000\n", "scan.points and spectrum.bins"),  # 31
])
def test_plans_that_cannot_run_are_refused_at_config_time(tmp_path, resolution, extra, key):
    """Cases 26-31: values that pass type checks but would hang (~1e11 planning steps),
    allocate terabytes, or put the peak outside the window: refused in well under 5 s,
    naming the key."""
    t0 = time.perf_counter()
    with pytest.raises(peaksift.ConfigError) as err:
        _load(tmp_path, extra, resolution=resolution, bins=2000)
    assert time.perf_counter() - t0 < 5.0
    assert f": {key}" in str(err.value)


def test_bin_width_that_would_allocate_terabytes(tmp_path):
    """Case 32: spectrum.bin_width = 1e-9 (1e11 bins) is refused before any array."""
    cfg = _config(tmp_path).read_text().replace("bins = 50", "bin_width = 1e-9")
    (tmp_path / "c.toml").write_text(cfg)
    with pytest.raises(peaksift.ConfigError, match="spectrum.bin_width gives 1e"):
        peaksift.load_config(tmp_path / "c.toml")


def test_reasonable_plans_are_accepted(tmp_path):
    """Case 33 (clean): the neighbours: a natural width of 5 GeV, a 0.5 GeV step, the
    default grid at 2 GeV resolution."""
    assert _load(tmp_path, resolution="absolute = 2.0\nnatural_width = 5.0") is not None
    assert _load(tmp_path, "[scan]\nstep = 0.5\n") is not None
    assert _load(tmp_path, resolution="relative = 0.01") is not None


def test_api_scan_and_limits_apply_the_same_rules():
    """Cases 34-38: the same ceilings in peaksift.scan (natural width, hypotheses, bins)
    and peaksift.upper_limits (natural width), and a clean scan beside them."""
    from peaksift.stats.bounds import MAX_BINS, MAX_HYPOTHESES

    m = _background()
    with pytest.raises(peaksift.FitError, match="natural width"):
        peaksift.scan(m, "voigt", "exponential", 20, absolute_resolution=2.0,
                      natural_width=1e6, window=(100.0, 200.0))
    with pytest.raises(peaksift.FitError, match="mass hypotheses"):
        peaksift.scan(m, "gaussian", "exponential", MAX_HYPOTHESES + 1,
                      absolute_resolution=2.0, window=(100.0, 200.0))
    with pytest.raises(peaksift.FitError, match="bins"):
        peaksift.scan(m, "gaussian", "exponential", 20, absolute_resolution=2.0,
                      window=(100.0, 200.0), bins=MAX_BINS * 100)
    with pytest.raises(peaksift.FitError, match="natural width"):
        peaksift.upper_limits(m, "voigt", "exponential", [150.0], absolute_resolution=2.0,
                              natural_width=1e6, window=(100.0, 200.0))
    ok = peaksift.scan(m, "gaussian", "exponential", 20, absolute_resolution=2.0,
                       window=(100.0, 200.0))
    assert ok.masses.size == 20


@pytest.mark.parametrize("bins", [1, 3])
def test_few_bins_are_not_called_a_blinded_range(tmp_path, bins):
    """Cases 39-40: 1 or 3 bins without blinding: the message is about the bin count."""
    with pytest.raises(peaksift.ConfigError) as err:
        _load(tmp_path, bins=bins)
    msg = str(err.value)
    assert "spectrum.bins" in msg and "blinded" not in msg


def test_blinding_that_leaves_no_sidebands(tmp_path, capsys):
    """Case 41: a blinded window covering nearly all bins names blinding.window; case 42:
    sidebands that exist but hold no candidate say so (not 'the window is empty')."""
    with pytest.raises(peaksift.ConfigError, match="blinding.window: only 2 bin"):
        _load(tmp_path, "[blinding]\nenabled = true\nwindow = [102.0, 198.0]\n")
    d = tmp_path / "d"
    _write_data(d, np.random.default_rng(1).uniform(130.0, 170.0, 500))
    cfg = _config(d, "[blinding]\nenabled = true\nwindow = [120.0, 180.0]\n")
    rc, _, err = _run(capsys, ["search", cfg, "--out", tmp_path / "o", "--quiet"])
    line = _one_line(err)
    assert rc == 2 and "hides every candidate" in line and "is empty" not in line


def test_utf8_byte_order_mark_gets_a_hint(tmp_path, capsys):
    """Case 43."""
    p = tmp_path / "c.toml"
    p.write_bytes(b"\xef\xbb\xbf" + _config(tmp_path).read_bytes())
    rc, _, err = _run(capsys, ["spectrum", p])
    assert rc == 2 and "byte-order mark" in _one_line(err)


def test_demo_with_too_few_events_names_a_real_option(tmp_path, capsys):
    """Case 44: `demo --events 1` names --events (there is no --files option)."""
    rc, _, err = _run(capsys, ["demo", tmp_path / "d", "--events", "1"])
    line = _one_line(err)
    assert rc == 2 and "--events 2" in line and "--files" not in line
    assert not (tmp_path / "d").exists()


# --------------------------------------------------------------------------- weights
@pytest.mark.parametrize("weight", [
    pa.array([[1.0]] * 10, type=pa.list_(pa.float64())),   # cases 45-46
    pa.array(["1.0"] * 10),                                 # cases 47-48
])
def test_weight_column_must_be_one_number_per_event(tmp_path, capsys, weight):
    """Cases 45-48: the CLI and the API refuse the same column, naming it and the file."""
    d = tmp_path / "d"
    f = _write_data(d, np.full(10, 150.0), weight=weight)
    rc, _, err = _run(capsys, ["spectrum", _config(d), "--out", tmp_path / "o", "--quiet"])
    line = _one_line(err)
    assert rc == 2 and "column 'weight'" in line and str(f) in line
    with pytest.raises(peaksift.InputError) as api:
        peaksift.pair(peaksift.read_events(f), "muon")
    assert "column 'weight'" in str(api.value) and str(f) in str(api.value)


@pytest.mark.parametrize("value, word", [(0.0, "zero"), (-1.0, "negative")])
def test_zero_or_negative_total_weight(tmp_path, capsys, value, word):
    """Cases 49-50: not 'no candidates ... loosen objects.cut'."""
    d = tmp_path / "d"
    m = _background(500)
    _write_data(d, m, weight=np.full(m.size, value))
    rc, _, err = _run(capsys, ["search", _config(d), "--out", tmp_path / "o", "--quiet"])
    line = _one_line(err)
    assert rc == 2 and "total weight of" in line and f"({word})" in line
    assert "loosen" not in line


def test_overflowing_weights(tmp_path, capsys):
    """Case 51: weights of 1e300 (squares overflow): one line, not a linear-algebra crash."""
    d = tmp_path / "d"
    m = _background(500)
    _write_data(d, m, weight=np.full(m.size, 1e300))
    rc, _, err = _run(capsys, ["search", _config(d), "--out", tmp_path / "o", "--quiet"])
    assert rc == 2 and "weights overflow" in _one_line(err)


def test_numeric_weights_are_used(tmp_path):
    """Case 52 (clean): float weights fill the spectrum with their sum (numpy's sum of the
    weights written here, 1e-9 relative)."""
    d = tmp_path / "d"
    m = _background(800)
    w = np.random.default_rng(2).uniform(0.5, 1.5, m.size)
    _write_data(d, m, weight=w)
    res = peaksift.search.run_spectrum(_config(d), out=False)
    assert res.histogram.total() == pytest.approx(float(w.sum()), rel=1e-9)


# -------------------------------------------------------------------------- warnings
def _results(**over):
    base = {"fit": {"valid": True, "gof": {"p_value": 0.4}, "problems": []},
            "calibration": None, "limits": None, "blinding": {"active": False}}
    base.update(over)
    return base


def test_doubts_thresholds():
    """Cases 53-60: each warning fires past its stated threshold and not before it
    (clean results, invalid fit, blinded fit, low and fine goodness of fit, invalid
    calibration, limits outside the band at too many and at few enough masses)."""
    from peaksift.search.doubts import BAND_OUTSIDE_MAX_FRACTION, GOF_P_MIN, doubts

    assert doubts(_results()) == []
    topics = [w["topic"] for w in doubts(_results(fit={"valid": False, "problems": ["x"]}))]
    assert topics == ["fit"]
    assert doubts(_results(fit={"valid": False, "problems": ["blinded"]},
                           blinding={"active": True})) == []
    gof = {"valid": True, "gof": {"p_value": GOF_P_MIN / 2}}
    assert [w["topic"] for w in doubts(_results(fit=gof))] == ["goodness_of_fit"]
    assert doubts(_results(fit={"valid": True, "gof": {"p_value": GOF_P_MIN * 2}})) == []
    cal = {"particle": "Z0", "valid": False, "problems": ["edm above tolerance"],
           "gof": {"p_value": 0.5}}
    w = doubts(_results(calibration=cal))
    assert [x["topic"] for x in w] == ["calibration"] and "Z0" in w[0]["message"]
    n = 20
    k_over = int(BAND_OUTSIDE_MAX_FRACTION * n) + 1
    band = {"expected_minus2": [1.0] * n, "expected_plus2": [3.0] * n}
    out = {**band, "observed": [0.5] * k_over + [2.0] * (n - k_over)}
    w = doubts(_results(limits=out))
    assert [x["topic"] for x in w] == ["limits"] and f"{k_over} of {n}" in w[0]["message"]
    k_in = int(BAND_OUTSIDE_MAX_FRACTION * n)
    inside = {**band, "observed": [0.5] * k_in + [2.0] * (n - k_in)}
    assert doubts(_results(limits=inside)) == []


def test_fit_warnings_name_the_free_fit():
    """The invalid-fit and goodness-of-fit warnings name the fit they are about as the
    report's Result table ('Valid (free fit)', 'Goodness of fit (free fit)') and the
    spectrum figure's box ('free fit: ...') name it: 'the free fit', words written here.
    They said 'the signal-plus-background fit' (the scan's fits are that too, and its
    numbers stand) and 'the fit at the best mass' (its mass floats from there)."""
    from peaksift.search.doubts import GOF_P_MIN, doubts

    bad = _results(fit={"valid": False, "problems": ["mass at a bound (110)"],
                        "gof": {"p_value": GOF_P_MIN / 2}})
    msgs = {w["topic"]: w["message"] for w in doubts(bad)}
    assert msgs["fit"].startswith("the free fit is invalid (mass at a bound (110))")
    assert msgs["goodness_of_fit"].startswith("the free fit has goodness-of-fit p = 0.0005")
    for m in msgs.values():
        assert "signal-plus-background fit" not in m and "fit at the best mass" not in m


def test_unmodelled_peak_is_flagged_everywhere(tmp_path, capsys):
    """Case 61: a second narrow peak the one-signal model cannot follow: the fit's
    goodness-of-fit p (checked against scipy's chi-square survival function, 1e-6
    relative) is below 0.001 and the warning is in results.json, the summary and both
    reports."""
    from scipy import stats

    rng = np.random.default_rng(7)
    m = np.r_[_background(6000, seed=5), rng.normal(130.0, 1.0, 600),
              rng.normal(170.0, 1.0, 600)]
    d = tmp_path / "d"
    _write_data(d, m)
    out = tmp_path / "o"
    rc, stdout, err = _run(capsys, ["search", _config(d), "--out", out, "--quiet"])
    assert rc == 0, err
    r = json.loads((out / "results.json").read_text())
    g = r["fit"]["gof"]
    assert stats.chi2.sf(g["chi2"], g["ndf"]) == pytest.approx(g["p_value"], rel=1e-6, abs=1e-300)
    assert g["p_value"] < 1e-3
    assert "goodness_of_fit" in [w["topic"] for w in r["warnings"]]
    assert "WARNING: the free fit has goodness-of-fit p" in stdout
    assert "## Warnings" in (out / "report.md").read_text()
    assert "<h2>Warnings</h2>" in (out / "report.html").read_text()


def test_clean_search_has_no_warnings(capsys, tmp_path):
    """Case 62 (clean): a spectrum the model describes (the exponential continuum and a clear
    Gaussian peak at the configured resolution): no warning, and the summary prints none."""
    d = tmp_path / "d"
    peak = np.random.default_rng(62).normal(150.0, 2.0, 300)
    _write_data(d, np.concatenate([_background(), peak]))
    _config(d)
    out = tmp_path / "o"
    rc, stdout, err = _run(capsys, ["search", d / "c.toml", "--out", out, "--quiet"])
    assert rc == 0, err
    r = json.loads((out / "results.json").read_text())
    assert r["fit"]["valid"], r["fit"]
    assert r["warnings"] == [] and "WARNING" not in stdout
    assert "## Warnings" not in (out / "report.md").read_text()


def test_background_only_search_warns_of_nothing_but_the_fit(data, capsys, tmp_path):
    """Case 62b: on the background-only continuum the free signal-plus-background fit's lowest
    minimum may sit at a bound (here a Gaussian of sigma at its 50 GeV bound takes up the
    continuum's curvature, 1.2 lower in -2 ln L than the narrow solutions): that fit is then
    flagged invalid, and that is the only warning a spectrum the background model describes
    may give.  (The fitter's own starts reach a valid dip 0.61 lower still: the fit reports
    it in ``lower_minimum``, below the 1 in -2 ln L that makes it a warning.)"""
    out = tmp_path / "o"
    rc, _, err = _run(capsys, ["search", data / "c.toml", "--out", out, "--quiet"])
    assert rc == 0, err
    r = json.loads((out / "results.json").read_text())
    assert [w["topic"] for w in r["warnings"]] == ([] if r["fit"]["valid"] else ["fit"])
    low = r["fit"]["lower_minimum"]
    assert low is None or low["delta_minus_two_ln_l"] < 1.0


# ------------------------------------------------------------ data that used to crash
@pytest.mark.parametrize("masses", [np.array([150.0]),                            # case 63
                                    np.r_[_background(), np.full(3000, 150.5)]])  # case 64
def test_degenerate_data_never_give_a_traceback(tmp_path, capsys, masses):
    """Cases 63-64: a one-event data set and a 3000-event peak inside one bin: the search
    either finishes with its doubts printed or stops with one line, never a traceback."""
    d = tmp_path / "d"
    _write_data(d, masses)
    rc, stdout, err = _run(capsys, ["search", _config(d), "--out", tmp_path / "o", "--quiet"])
    assert "Traceback" not in err
    if rc == 0:
        assert "INVALID" in stdout or "WARNING" in stdout
    else:
        assert rc == 2 and _one_line(err)
