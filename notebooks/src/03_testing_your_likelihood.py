# %% [markdown]
# # Testing your own likelihood with the kit
#
# An invented scenario. A beekeeper counts the bees leaving a hive in one-minute spells on
# a calm morning, and models the counts as Poisson with an unknown rate $\lambda$ (bees per
# minute) and a Gamma(shape 20, rate 1) prior (about 20 bees a minute in this apiary). The
# keeper writes the log-density by hand, with a hand-written derivative for speed, and
# plants a bug in it without noticing. `flowpost.testing` catches it before any run.

# %%
import matplotlib

matplotlib.use("Agg")  # a non-interactive backend
import jax
import jax.numpy as jnp
import jax.scipy.stats as jst
import numpy as np

import flowpost as fp
from flowpost.testing import GammaPoisson, Region, assert_moments_match, assert_score_matches, check_health

COUNTS = jnp.array([17, 22, 19, 25, 21, 18, 23, 20, 16, 24, 22, 19], dtype=jnp.float32)
DATA = {"counts": COUNTS}
TYPICAL = {"lam": 20.0}


def log_p(theta, data):
    lam = theta["lam"]
    return jst.gamma.logpdf(lam, 20.0, scale=1.0) + jnp.sum(jst.poisson.logpmf(data["counts"], lam))


# %% [markdown]
# ## The hand-written version, with a planted bug
#
# The Poisson log-likelihood summed over the rows is $\sum_i y_i \log\lambda - n\lambda +
# \text{const}$. The keeper writes $\log\lambda$ with a custom derivative rule and gets the
# rule wrong: $d\log\lambda = d\lambda\cdot\lambda$ instead of $d\lambda/\lambda$. The
# values are right, so every printout looks fine; only the gradient is wrong, and the
# gradient is what moves the particles.


# %%
@jax.custom_jvp
def log_rate(lam):
    return jnp.log(lam)


@log_rate.defjvp
def _log_rate_jvp(primals, tangents):
    (lam,), (dlam,) = primals, tangents
    return jnp.log(lam), dlam * lam  # the planted bug: should be dlam / lam


def log_p_handwritten(theta, data):
    lam, y = theta["lam"], data["counts"]
    loglik = jnp.sum(y) * log_rate(lam) - y.shape[0] * lam - jnp.sum(jax.scipy.special.gammaln(y + 1))
    return jst.gamma.logpdf(lam, 20.0, scale=1.0) + loglik


print("values agree:", float(log_p(TYPICAL, DATA)), float(log_p_handwritten(TYPICAL, DATA)))

# %% [markdown]
# ## 1. The score check catches it
#
# `assert_score_matches` compares the autodiff gradient with central finite differences (in
# float64) at points of a region, here 16 points near a typical value.

# %%
near = Region.near(TYPICAL, scale=2.0, num_points=16, key=jax.random.key(0))
print(assert_score_matches(log_p, near, data=DATA).summary())

try:
    assert_score_matches(log_p_handwritten, near, data=DATA)
    print("not caught")
except AssertionError as err:
    print("CAUGHT:", err)

# %% [markdown]
# ## 2. The health checks catch another slip
#
# A second planted bug: the first count is taken for a header and dropped. The score is
# consistent with the value, so the score check passes; the health check that permutes the
# (declared exchangeable) data rows sees the log-density change.


# %%
def log_p_drops_first(theta, data):
    return log_p(theta, {"counts": data["counts"][1:]})


print(check_health(log_p, near, data=DATA, exchangeable=True).summary())
print()
print(check_health(log_p_drops_first, near, data=DATA, exchangeable=True).summary())

# %% [markdown]
# ## 3. A whole run against the closed form
#
# The gamma-Poisson model has a closed-form posterior, $\lambda \mid y \sim
# \mathrm{Gamma}(20 + \sum y_i,\ 1 + n)$ ("Bayesian Data Analysis" (2013), sec. 2.6), and the
# kit ships it as `GammaPoisson`. A short MALA run (Metropolis-adjusted, so no step-size bias)
# on the correct log-density matches its mean and variance within Monte-Carlo error
# (z-scores in standard errors; the run moves $\log\lambda$, whose posterior sd is about
# 0.06, hence the step).

# %%
reference = GammaPoisson(shape=20.0, rate=1.0)
post = reference.posterior({"counts": np.asarray(COUNTS)})
result = fp.run(
    fp.Target(log_p, data=DATA, support={"lam": fp.Positive()}),
    fp.MALA(step_size=2e-3),
    {"lam": jnp.full(1000, 20.0)},
    key=jax.random.key(1),
    steps=1000,
    window=250,
    progress=False,
)
print("status:", result.status)
print(f"exact posterior mean {post.mean():.3f}, sd {post.std():.3f}")
z = assert_moments_match(result.particles["lam"][:, None], np.array([post.mean()]), np.array([[post.var()]]))
print(z)
