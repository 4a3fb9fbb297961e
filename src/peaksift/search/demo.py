"""The demo search's configuration text, written next to the generated demo data, and the
background template its spurious-signal test reads."""

from __future__ import annotations

import os
from pathlib import Path

#: ``peaksift demo OUTDIR`` writes it next to the data it generates (``{files}`` filled in)
DEMO_CONFIG = """\
# The demo search: opposite-charge isolated muon pairs in the invented collider run.
# Every key is documented, with its default, in docs/config.md.

[input]
files = {files}              # relative to this file

[objects]
collection = "muon"
cut = "pt > 20 and abs(eta) < 2.4 and isolation < 0.15"

[pairing]
charge = "opposite"
choose = "leading"             # one pair per event: the two hardest selected muons

[spectrum]
# The search window starts above the Z peak, which would otherwise dominate the
# background model; the Z is fitted separately as a calibration check (below).
window = [110.0, 200.0]
bin_width = 1.0

[model]
signal = "gaussian"            # free fit at the best mass: mass and width float
background = "powerlaw"        # m^-k: the falling opposite-charge continuum

[model.resolution]
# sigma(m) of the dimuon mass, measured on the simulated-sample variant
# (`peaksift demo --weighted`: reconstructed vs generated mass, central 68%).
table = [[90.0, 0.99], [120.0, 1.44], [150.0, 1.98], [200.0, 2.80]]

[significance]
method = "upcrossings"         # Gross and Vitells (2010), N0 from background-only toys
toys = 100
seed = 20261201

[limits]
cl = 0.95
points = 25
luminosity = 10.0              # fb^-1 of the invented run
luminosity_uncertainty = 0.02
efficiency = 0.55              # dimuon selection efficiency x acceptance (assumed)
efficiency_uncertainty = 0.05

[systematics]
# The mass scale and resolution of the invented detector are known to 0.2% and 10%
# (nuisance parameters profiled everywhere); the background function is chosen by the
# order test in three families and profiled as a discrete choice (the envelope).
mass_scale = 0.002
mass_resolution = 0.1
background_families = ["powersum", "exppoly1", "bernstein"]
# The generator's expected background in the window (written beside the data): the
# spurious-signal test fits every candidate to it and flags a signal above 20% of the
# statistical error (common practice).
template = "background_template.json"

[calibration]
particle = "Z0"                # fitted in its own window; compared with the particle tables
window = [70.0, 110.0]
bins = 80
signal = "crystalball"         # Gaussian core with radiative tails
background = "exponential"

[run]
name = "demo run"              # the invented run, as labelled on every figure
sqrt_s = 10.0                  # TeV; the label's luminosity is limits.luminosity

[execution]
engine = "serial"

[output]
dir = "../demo_out"
formats = ["png"]             # add "pdf" for a paper (a third more drawing time)
log_scale = false
"""


def demo_config_text(files: list[str] | tuple[str, ...]) -> str:
    """The demo search configuration with ``input.files`` set to ``files``."""
    import json

    return DEMO_CONFIG.format(files=json.dumps(list(files)))


def write_demo_config(outdir: str | os.PathLike[str]) -> Path | None:
    """Write ``search.toml`` for the demo data in ``outdir`` (read from its ``truth.json``).

    Returns the path, or None when ``outdir`` holds no demo truth file.  The config's output
    directory is ``search_out`` inside ``outdir``.  Written under the output-folder contract
    (:mod:`peaksift._output`) beside the demo's files: a ``search.toml`` peaksift did not
    write is refused, never replaced.
    """
    import json

    from .._files import atomic_write
    from .._output import staged_output

    out = Path(outdir)
    truth = out / "truth.json"
    if not truth.exists():
        return None
    files = json.loads(truth.read_text()).get("files") or ["*.parquet"]
    text = demo_config_text(files).replace('dir = "../demo_out"', 'dir = "search_out"')
    # the demo itself already applied the folder rule; this only adds its config
    with staged_output(out, "demo-config", share=True, names=("search.toml",)) as stage:
        assert stage is not None
        atomic_write(stage.path / "search.toml", text)
    write_demo_template(out / "search.toml")
    return out / "search.toml"


def write_demo_template(config: str | os.PathLike[str]) -> Path | None:
    """Write the background template a demo config names (``systematics.template``): the
    generator's expected background (:func:`peaksift.simulate.expected.expected_background`)
    in the config's bins, for the number of events and the seed of the ``truth.json``
    beside the config.  Returns its path, or None when the config names no template or no
    truth file is there.  Written under the output-folder contract, like the config."""
    import json

    import numpy as np

    from .._output import staged_output
    from ..config import load_config
    from ..simulate.expected import expected_background

    try:
        import tomllib as _toml
    except ModuleNotFoundError:  # Python 3.10 (as config.build reads TOML)
        import tomli as _toml  # type: ignore[no-redef]

    path = Path(config)
    truth_file = path.parent / "truth.json"
    raw = _toml.loads(path.read_text(encoding="utf-8"))
    syst = dict(raw.get("systematics") or {})
    template = syst.pop("template", None)
    if not template or not truth_file.exists():
        return None
    # the config checks that its template covers the window: read without it, this being
    # the step that writes it (the window and bins are all it takes from the config)
    cfg = load_config({**raw, "systematics": syst}, base_dir=path.parent)
    truth = json.loads(truth_file.read_text())
    lo, hi = cfg.spectrum.window
    n = int(truth["n_events"])
    # about a hundred times the data's pairs in the window whatever the size (the committed
    # demo's 300,000 events: 10^6 decays per process); small demos stay quick
    decays = min(1_000_000, max(10_000, -(-10 * n // 3)))
    hist = expected_background(np.linspace(lo, hi, cfg.spectrum.bins + 1), n_events=n,
                               seed=int(truth["seed"]), decays=decays)
    target = Path(template) if Path(template).is_absolute() else path.parent / template
    with staged_output(target.parent, "demo-template", share=True,
                       names=(target.name,)) as stage:
        assert stage is not None
        hist.save(stage.path / target.name)
    return target
