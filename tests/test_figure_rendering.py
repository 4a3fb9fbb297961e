"""Our figures come out the same pixels whatever was drawn before them and whatever the
user's rcParams are when they are saved.

Each check runs in a fresh interpreter (a subprocess), so that the process's one mathtext
parser (``peaksift._style``) starts empty, as in a user's script.  The reference is outside
the code under test: the PNG of the same figure drawn first in a fresh process under
matplotlib's own defaults, compared pixel by pixel (tolerance: none, the arrays are equal).
A control in each script shows that the disturbance is real: a plain matplotlib figure
drawn the same way does change.
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]

# a demo-like fit (counts up to ~60 per bin: a spectrum whose y axis has a tick "60"), the
# run label, the pair's mass symbol and the fitted numbers' table
_COMMON = r"""
import io, json, sys
import numpy as np
import matplotlib
matplotlib.use("svg")  # the user's backend: ours must not change it
import peaksift
from peaksift import MassHistogram
from peaksift._annotations import RunLabel

rng = np.random.default_rng(11)
h = MassHistogram(bins=90, range=(110.0, 200.0)).fill(np.r_[
    110 + rng.exponential(30.0, 3000), rng.normal(152.0, 2.0, 150)])
fit = peaksift.fit(h, "gaussian", "exponential", start={"mass": 150.0, "sigma": 2.0})
RUN = RunLabel("demo run", 13.6, 140.0, r"$\mu^+\mu^-$")


def png(fig, dpi=150):  # the resolution of a run's files
    import matplotlib.image as mpimg
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=dpi)
    buf.seek(0)
    return mpimg.imread(buf)


def demo_like():
    return fit.plot(run=RUN, symbol=r"m_{\mu\mu}")


def plain(text):
    from matplotlib.figure import Figure
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    fig = Figure(figsize=(3, 2))
    FigureCanvasAgg(fig)
    ax = fig.subplots()
    ax.set_xlabel(text)
    ax.plot([0, 60], [0, 60])
    return fig
"""

_RC_SCRIPT = _COMMON + r"""
reference = png(demo_like())
control = png(plain(r"$m_{\mu\mu}$ [GeV]"))
user = {"mathtext.fontset": "cm", "mathtext.default": "it", "font.family": "serif",
        "font.size": 14.0, "text.color": "#3355aa", "hatch.linewidth": 3.0}
matplotlib.rcParams.update(user)
user = {k: matplotlib.rcParams[k] for k in user}  # as matplotlib keeps them
fig = demo_like()                         # drawn under the user's rcParams ...
after = png(fig)                          # ... and saved by the user with fig.savefig
old = png(demo_like())
label = fig.axes[-1].xaxis.label
print(json.dumps({
    "same": bool(np.array_equal(reference, after)) and bool(np.array_equal(reference, old)),
    "control_differs": not np.array_equal(control, png(plain(r"$m_{\mu\mu}$ [GeV]"))),
    "rc_kept": {k: matplotlib.rcParams[k] for k in user} == user,
    "backend": matplotlib.get_backend(),
    "math_font": label.get_fontproperties().get_math_fontfamily(),
    "family": label.get_fontproperties().get_family(),
}))
"""

_ORDER_SCRIPT = _COMMON + r"""
from peaksift._annotations import draw_header
from peaksift._style import figure_style, new_figure
from peaksift._value_table import value_table


def others():
    # other figures at other resolutions, typesetting the run's expressions (the run
    # label, the mass axis, a log axis's powers of ten, sigma levels, the fitted symbols)
    # in the shared parser -- laid out only, as a drawer typesetting early would, and drawn
    for dpi in (50, 72, 150, 300):
        f, ax = new_figure((3.0, 2.0))
        with figure_style():  # as the figure functions draw
            f.set_dpi(dpi)
            draw_header(ax, RUN, "x")
            texts = [ax.set_xlabel(r"$m_{\mu\mu}$ [GeV]"), ax.set_ylabel("candidates / 1 GeV")]
            texts += [ax.text(0.5, 0.5, f"$\\mathdefault{{10^{{{k}}}}}$") for k in range(-9, 4)]
            texts += [ax.text(0.5, 0.5, f" {k}$\\sigma$", fontsize=9) for k in range(1, 6)]
            texts += [ax.text(0.1, 0.1, t) for t in ("60", "$60$", "6", "0")]
            value_table(ax, [(n, "1", "\u00b1 1", "") for n in
                             (r"$N_{sig}$", r"$N_{bkg}$", r"$\sigma$", r"$\Gamma$")])
            r = f.canvas.get_renderer()
            for t in {*texts, *ax.texts}:  # laid out only
                t.get_window_extent(r)
        png(f, dpi=dpi)
        png(fit.plot(symbol=r"m_{ee}", note="another"), dpi=dpi)
        png(h.plot(), dpi=dpi)


ref = sys.argv[2]
if sys.argv[1] == "first":  # drawn first in a fresh process, then again after the others
    first = png(demo_like())
    np.save(ref, first)
    others()
    same = np.array_equal(first, png(demo_like()))
else:  # drawn after the others only
    others()
    first = np.load(ref)
    same = np.array_equal(first, png(demo_like()))
print(json.dumps({"same": bool(same), "shape": list(first.shape)}))
"""


def _run(code: str, tmp: Path, *args: str) -> dict:
    out = subprocess.run([sys.executable, "-c", code, *args], capture_output=True, text=True,
                         check=False, cwd=REPO, timeout=600,
                         env={"PYTHONPATH": str(REPO / "src"), "PATH": "/usr/bin:/bin",
                              "MPLCONFIGDIR": str(tmp)})
    assert out.returncode == 0, out.stderr[-3000:]
    return json.loads(out.stdout.strip().splitlines()[-1])


def test_user_rcparams_do_not_reach_our_saved_figures(tmp_path):
    """A fit figure drawn and saved (``fig.savefig``) under a user's rcParams (another math
    font set, italic math, a serif font, another size and text colour, thick hatching) is
    pixel for pixel the one drawn under matplotlib's defaults; the user's rcParams and
    backend are as the user set them afterwards."""
    got = _run(_RC_SCRIPT, tmp_path)
    assert got["control_differs"], "the user's rcParams did not change a plain figure"
    assert got["same"]
    assert got["rc_kept"] and got["backend"] == "svg"
    assert got["math_font"] == "dejavusans" and got["family"] == ["sans-serif"]


def test_a_figure_is_the_same_pixels_after_other_figures(tmp_path):
    """The demo-like fit figure drawn first in a fresh process, again after other figures
    -- the run's expressions typeset in the shared mathtext parser at 50 to 300 dpi -- and
    in a second process after such figures only, is pixel for pixel the same (the guard for
    a tick label "60" once drawn as a "6" over a "0" after an early typesetting)."""
    ref = str(tmp_path / "first.npy")
    got = _run(_ORDER_SCRIPT, tmp_path, "first", ref)
    assert got["shape"][0] > 500 and got["same"]
    assert _run(_ORDER_SCRIPT, tmp_path, "later", ref)["same"]


def test_our_png_is_matplotlibs_pixels_without_the_alpha_channel(tmp_path):
    """The PNG our canvas writes (opaque figures without the alpha channel: smaller, faster
    to encode) against the PNG matplotlib's own Agg writer makes of the same canvas (the
    outside reference, read back by Pillow): the same pixels, exactly, and the same
    Software note and resolution; a transparent figure keeps its alpha, as matplotlib's does;
    matplotlib's options (``metadata``) still reach the file."""
    import io

    import numpy as np
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from PIL import Image

    from peaksift._style import figure_style, new_figure

    def ours_and_matplotlibs(**save):
        fig, ax = new_figure((3.0, 2.0))
        with figure_style():
            ax.plot([0, 60], [0, 60], label=r"$m_{\mu\mu}$")
            ax.set_xlabel(r"$m_{\mu\mu}$ [GeV]")
            ax.legend()
        buf, ref = io.BytesIO(), io.BytesIO()
        fig.savefig(buf, format="png", dpi=150, **save)
        FigureCanvasAgg(fig)  # matplotlib's own canvas in place of ours, in our style
        with figure_style():
            fig.savefig(ref, format="png", dpi=150, **save)
        return Image.open(buf), Image.open(ref)

    ours, ref = ours_and_matplotlibs()
    assert ours.mode == "RGB" and ref.mode == "RGBA"
    assert np.array_equal(np.asarray(ours.convert("RGBA")), np.asarray(ref))
    assert ours.info["Software"] == ref.info["Software"] and ours.info["dpi"] == ref.info["dpi"]
    ours, _ = ours_and_matplotlibs(transparent=True)
    assert ours.mode == "RGBA" and np.asarray(ours)[..., 3].min() == 0
    ours, _ = ours_and_matplotlibs(metadata={"Title": "a test"})
    assert ours.info["Title"] == "a test"
