# %% [markdown]
# # Quickstart: how fast does the studio kiln cool?
#
# An invented scenario. A pottery studio switches its kiln off at 1000 °C and logs the
# temperature every 20 minutes for eight hours. Newton's law of cooling says
#
# $$T(t) = T_\mathrm{room} + (T_0 - T_\mathrm{room})\, e^{-k t},$$
#
# and the thermocouple adds Gaussian noise of scale $\sigma$. We want the posterior of the
# cooling rate $k$ (per hour), the room temperature and $\sigma$. The log and the
# log-density ship with flowpost in `flowpost.demo` (the log is generated with a fixed seed).

# %%
import io

import matplotlib

matplotlib.use("Agg")  # a non-interactive backend: figures are stored in the notebook
import jax
import jax.numpy as jnp
import matplotlib.pyplot as plt
import numpy as np
from IPython.display import Image, display

import flowpost as fp
from flowpost.demo import TRUE, cooling_log_p, draw_fit, kiln_log


def show(fig):
    """Store a figure in the notebook as a PNG (the Agg backend draws; nothing pops up)."""
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=80)
    plt.close(fig)
    display(Image(buf.getvalue()))


t, temp = kiln_log()
print(f"{len(t)} readings over {t[-1]:.1f} hours; first readings: {np.round(temp[:4], 1)}")

# %% [markdown]
# ## The target
#
# `cooling_log_p(theta, data)` is an ordinary JAX function of a dict of parameters. The
# target says which parameters are constrained: `k` and `sigma` are positive, so flowpost
# moves the particles in $\log k$ and $\log\sigma$ and adds the log-Jacobian itself.

# %%
target = fp.Target(
    cooling_log_p,
    data=(jnp.asarray(t), jnp.asarray(temp)),
    support={"k": fp.Positive(), "sigma": fp.Positive()},
)

# %% [markdown]
# ## The run
#
# The three parameters live on very different scales ($k$ is pinned to about 1 %, the room
# temperature only to a few degrees), so we use the affine-invariant ensemble Langevin
# stepper, which preconditions by the ensemble's own covariance. It needs a start with a
# spread in every direction; a small jitter around the prior's centre is enough.

# %%
n = 200
kk, kr, ks = jax.random.split(jax.random.key(1), 3)
init = {
    "k": 0.3 * jnp.exp(1e-3 * jax.random.normal(kk, (n,))),
    "room": 20.0 + 1e-2 * jax.random.normal(kr, (n,)),
    "sigma": 10.0 * jnp.exp(1e-3 * jax.random.normal(ks, (n,))),
}
result = fp.run(
    target, fp.EnsembleLangevin(step_size=0.05), init, key=jax.random.key(0), steps=1500, window=250, progress=False
)
print("status:", result.status, "| ok:", result.ok)
print(result.summary())
print(f"values used to generate the log: {TRUE}")

# %% [markdown]
# ## What the monitor saw
#
# One row per window of 250 steps: the mean log-density, the drift of the ensemble's centre
# and spread per unit of flow time, the kernel Stein discrepancy (KSD), and for a stochastic
# stepper R-hat and the effective sample size of a few tracked particles. See the docs page
# "The monitor" for what each column means and where it can mislead.

# %%
print(result.history.table(["step", "mean_logp", "centre_drift", "spread_drift", "ksd", "rhat", "ess"]))

# %% [markdown]
# ## The fitted curve
#
# Every particle is one plausible cooling curve; the band is the 90 % range across them.

# %%
fig, ax = plt.subplots(figsize=(6, 3.5))
draw_fit(ax, result.particles, t, temp)  # flowpost.demo draws the band, the median and the log
show(fig)

# %% [markdown]
# ## The run at a glance
#
# `result.plot()` draws the monitor's curves over the steps, the marginals of chosen
# parameters and one pairwise scatter.

# %%
fig = result.plot(params=["k", "room", "sigma"], pair=("k", "room"))
show(fig)
