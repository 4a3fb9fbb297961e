"""A file peaksift wrote and the user then edited is never replaced by a rerun.

The manifest's fingerprints are checked against Python's own ``hashlib.sha256`` of the bytes
on disk (an implementation outside peaksift); the refusals against the user's bytes, which
must survive exactly, and the one-line ``peaksift: error:`` contract (exit 2).  Small data:
the spectrum and fit commands on ~2800 events, a 500-event demo.
"""

from __future__ import annotations

import hashlib
import json
import textwrap
from pathlib import Path

import numpy as np
import pytest

from peaksift import _output
from peaksift.cli import main
from peaksift.errors import OutputError

pa = pytest.importorskip("pyarrow")
pq = pytest.importorskip("pyarrow.parquet")

MANIFEST = "peaksift-manifest.json"


def _muons(m: np.ndarray) -> pa.Array:
    """Two back-to-back massless muons with pT = m/2 at eta = 0: invariant mass exactly m."""
    n = m.size
    st = pa.StructArray.from_arrays(
        [pa.array(np.repeat(m / 2.0, 2)), pa.array(np.zeros(2 * n)),
         pa.array(np.tile([0.0, np.pi], n)), pa.array(np.zeros(2 * n)),
         pa.array(np.tile(np.array([1, -1], np.int8), n))],
        names=["pt", "eta", "phi", "mass", "charge"])
    return pa.ListArray.from_arrays(pa.array(np.arange(0, 2 * n + 1, 2, dtype=np.int32)), st)


@pytest.fixture(scope="module")
def cfg(tmp_path_factory) -> Path:
    d = tmp_path_factory.mktemp("edited_data")
    rng = np.random.default_rng(5)
    m = 100.0 + rng.exponential(40.0, 3000)
    m = np.concatenate([m[m < 200.0], rng.normal(150.0, 2.0, 150)])
    pq.write_table(pa.table({"muon": _muons(m)}), d / "ev.parquet")
    p = d / "c.toml"
    p.write_text(textwrap.dedent("""\
        [input]
        files = ["ev.parquet"]
        [objects]
        collection = "muon"
        cut = "pt > 1"
        [spectrum]
        window = [100.0, 200.0]
        bins = 50
        [model]
        background = "exponential"
        [model.resolution]
        absolute = 2.0
        [significance]
        toys = 0
        [limits]
        enabled = false
        [output]
        formats = ["png"]
        """))
    return p


def _snapshot(folder: Path) -> dict[str, bytes]:
    return {p.relative_to(folder).as_posix(): p.read_bytes()
            for p in sorted(folder.rglob("*")) if p.is_file()}


def _refused(capsys, argv) -> str:
    capsys.readouterr()
    rc = main([str(a) for a in argv])
    err = capsys.readouterr().err
    lines = [x for x in err.splitlines() if x.strip()]
    assert rc == 2 and len(lines) == 1 and lines[0].startswith("peaksift: error: "), err
    return lines[0]


def test_the_manifest_holds_each_files_sha256_and_size(cfg, tmp_path):
    """Fingerprints as hashlib computes them from the bytes on disk (exact)."""
    out = tmp_path / "o"
    assert main(["spectrum", str(cfg), "--out", str(out), "--quiet"]) == 0
    files = json.loads((out / MANIFEST).read_text())["files"]
    assert set(files) == set(_snapshot(out)) - {MANIFEST}
    for name, rec in files.items():
        data = (out / name).read_bytes()
        assert rec["sha256"] == hashlib.sha256(data).hexdigest(), name
        assert rec["size"] == len(data), name


@pytest.mark.parametrize("command, edited", [
    (["spectrum"], "spectrum.json"),                   # replaced by the rerun
    (["spectrum"], "figures/spectrum.png"),            # inside a folder of ours
    (["fit", "--mass", "150"], "fit.json"),
])
def test_an_edited_output_is_refused_and_kept(cfg, capsys, tmp_path, command, edited):
    """The reviewer's case (F16): notes appended to an output, then the same command again:
    one line naming the file, every byte of the folder as it was (the notes kept)."""
    out = tmp_path / "o"
    assert main([command[0], str(cfg), *command[1:], "--out", str(out), "--quiet"]) == 0
    with open(out / edited, "ab") as f:
        f.write(b"MY NOTES\n")
    before = _snapshot(out)
    for share in ([], ["--share-folder"]):  # sharing the folder does not lift it
        line = _refused(capsys, [command[0], cfg, *command[1:], "--out", out, "--quiet",
                                 *share])
        assert edited in line and "changed since peaksift wrote it" in line
        assert "nothing was written" in line
        assert _snapshot(out) == before
        assert not list(out.glob(".peaksift-staging-*"))
    # moved away, the rerun goes ahead and the user's copy stays theirs
    (out / edited).rename(tmp_path / "kept")
    assert main([command[0], str(cfg), *command[1:], "--out", str(out), "--quiet"]) == 0
    assert (tmp_path / "kept").read_bytes().endswith(b"MY NOTES\n")


def test_an_edited_file_the_rerun_would_remove_is_refused(cfg, capsys, tmp_path):
    """A figure format dropped from the config removes that figure on the rerun (the
    contract), unless the user changed it: then refused."""
    both = cfg.read_text().replace('formats = ["png"]', 'formats = ["png", "pdf"]').replace(
        '"ev.parquet"', json.dumps(str(cfg.parent / "ev.parquet")))
    c2 = tmp_path / "c2.toml"
    c2.write_text(both)
    out = tmp_path / "o"
    assert main(["spectrum", str(c2), "--out", str(out), "--quiet"]) == 0
    (out / "figures" / "spectrum.pdf").write_bytes(b"%PDF- my annotated copy")
    c2.write_text(both.replace('["png", "pdf"]', '["png"]'))
    before = _snapshot(out)
    assert "figures/spectrum.pdf" in _refused(capsys, ["spectrum", c2, "--out", out, "-q"])
    assert _snapshot(out) == before


def test_a_file_edited_during_the_run_is_refused_at_the_moves(tmp_path):
    """The check is repeated just before the moves: an edit made while the run worked is
    kept, the run's files are not moved in."""
    out = tmp_path / "o"
    with _output.staged_output(out, "search") as stage:
        (stage.path / "results.json").write_text('{"run": 1}\n')
    with pytest.raises(OutputError, match="results.json changed since"), \
            _output.staged_output(out, "search") as stage:
        (stage.path / "results.json").write_text('{"run": 2}\n')
        (out / "results.json").write_text('{"run": 1, "mine": true}\n')
    assert (out / "results.json").read_text() == '{"run": 1, "mine": true}\n'
    assert not list(out.glob(".peaksift-staging-*"))


def test_an_older_manifest_without_fingerprints_is_read_as_before(tmp_path):
    """A manifest written before the fingerprints (command and time only): its files are
    replaced as they used to be, and the new manifest has their fingerprints."""
    out = tmp_path / "o"
    out.mkdir()
    (out / "results.json").write_text("edited or not, no way to tell\n")
    (out / MANIFEST).write_text(json.dumps({"written_by": "peaksift", "files": {
        "results.json": {"command": "search", "written": "2026-01-01T00:00:00+00:00"}}}))
    with _output.staged_output(out, "search") as stage:
        (stage.path / "results.json").write_text('{"run": 2}\n')
    assert (out / "results.json").read_text() == '{"run": 2}\n'
    rec = json.loads((out / MANIFEST).read_text())["files"]["results.json"]
    assert rec["sha256"] == hashlib.sha256(b'{"run": 2}\n').hexdigest()


def test_the_demo_refuses_before_writing_anything_when_its_config_was_tuned(capsys, tmp_path):
    """`peaksift demo DIR` twice with the user's edit of DIR/search.toml in between: the
    second run stops before its events are written (the config comes last), nothing
    changes; --help no longer claims files are not overwritten."""
    d = tmp_path / "demo"
    assert main(["demo", str(d), "--events", "500"]) == 0
    cfg = d / "search.toml"
    cfg.write_text(cfg.read_text().replace("toys = ", "toys = 1 # mine\n# toys = ", 1))
    before = _snapshot(d)
    line = _refused(capsys, ["demo", d, "--events", "500", "--seed", "9"])
    assert "search.toml" in line and "changed since peaksift wrote it" in line
    assert _snapshot(d) == before
    capsys.readouterr()
    with pytest.raises(SystemExit):
        main(["demo", "--help"])
    assert "not overwritten" not in capsys.readouterr().out
