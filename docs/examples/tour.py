# %% [markdown]
# # A tour of sheetview from Python
#
# Every structure and curve here is **invented**: the structure is a bundled sample made by
# sheetview's own generator (`sheetview synth`), and the "measured" curves at the end are
# made up in this script to show the comparison functions. None of the numbers says
# anything about real cement. Run it with `python docs/examples/tour.py` (the test suite
# runs it headless, `tests/test_examples.py`).

# %%
from pathlib import Path

import numpy as np

import sheetview as sv

here = Path(__file__).resolve().parent
sample = here.parent.parent / "sample_structures" / "single_stack.csv"
out = Path.cwd() / "tour_output"

# %% [markdown]
# ## Load and measure
# `sv.read` gives the structure; `sv.measure` runs every measure that applies with the
# same settings as `sheetview measure` (here a 0.2 nm voxel to keep it quick) and returns
# a `Measurement`: its repr is a short overview, each measure is an attribute.

# %%
s = sv.read(sample)
m = sv.measure(s, voxel=0.2, lines=4000)
print(m)
print("stacking number (mean):", m.stacking.mean)
print("volume fractions of the domain:", m.phases.fractions)
print("m2/g:", round(m.surface.interfaces.specific_surface_m2_per_g, 1),
      "-", m.summary()["specific_surface_basis"]["m2_per_g"])

# %% [markdown]
# ## A table for pandas
# `to_frame()` is one row of every scalar of the summary, with dotted column names, so
# that many structures make one DataFrame (`pandas.concat`).

# %%
df = m.to_frame()
print(df[["n_prisms", "volume_fractions.solid", "volume_fractions.interlayer",
          "specific_surface_nm-1"]].T)

# %% [markdown]
# ## Figures
# Every figure is a matplotlib `Figure` (no global state changes; in a notebook it shows
# inline). `m.plot(name)` draws a measure's figure; `ax=` draws into your own axes.

# %%
fig = m.plot("stacking")
fig_sections = m.plot("sections")
from matplotlib.figure import Figure  # noqa: E402

own = Figure(figsize=(5, 3.5))
ax = own.add_subplot()
m.plot("correlation", ax=ax)
ax.set_title("S2 of the solid, in my own axes")

# %% [markdown]
# ## Scattering and NMR beside a curve
# The opt-in measures `scattering` and `relaxation` predict a SANS curve and a T2
# distribution. Here they are held against an invented "measured" SANS curve (a power law
# with a flat background) and an invented log-normal T2 distribution.

# %%
from sheetview.measures.relaxation import compare_t2  # noqa: E402
from sheetview.measures.scattering import compare_curve  # noqa: E402

m2 = sv.measure(s, only="scattering,relaxation", voxel=0.2)
curve = m2.scattering.curve
q_exp = np.geomspace(0.5, 5.0, 30)                     # nm^-1, invented
i_exp = 2e-3 * q_exp ** -3.2 + 0.05                    # cm^-1, invented
fit = compare_curve(curve, q_exp, i_exp)
print(f"scattering: scale {fit.scale:.3g}, background {fit.background:.3g} cm^-1, "
      f"reduced chi2 {fit.chi2_reduced:.3g}")
t2_exp = np.geomspace(1e-5, 1e-2, 40)                  # s, invented
amp_exp = np.exp(-0.5 * (np.log(t2_exp / 3e-4) / 0.6) ** 2)
cmp_t2 = compare_t2(m2.relaxation, t2_exp, amp_exp)
print(f"T2: model {cmp_t2.logmean_model_s * 1e3:.3g} ms against {cmp_t2.logmean_experiment_s * 1e3:.3g} ms "
      f"(shift {cmp_t2.shift_decades:+.2f} decades)")

from sheetview.figures import plot_relaxation, plot_scattering  # noqa: E402

fig_q = plot_scattering(curve, comparison=fit)
fig_t2 = plot_relaxation(m2.relaxation, comparison=cmp_t2)

# %% [markdown]
# ## A report folder
# `write` gives the same folder as `sheetview measure FILE -o FOLDER`.

# %%
written = m.write(out, force=True)
print(len(written), "files in", out)
