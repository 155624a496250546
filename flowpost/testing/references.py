"""Conjugate models whose posterior is known in closed form, for testing samplers.

Each family is a small frozen dataclass holding the prior's hyper-parameters, with the
common interface of :class:`ClosedFormModel`:

``log_density(theta, data)``
    Unnormalised log posterior ``log prior(theta) + log likelihood(data | theta)`` written
    with ``jax.scipy.stats``; ``theta`` is a dict with one leaf, ``data`` a dict of arrays
    whose leaves share a leading row axis (rows are exchangeable). Computed in the dtype
    of ``theta``.
``supports``
    Class attribute: dict from theta key to a support name understood by
    :func:`flowpost.model.as_support`: ``"real"``, ``"positive"``, ``"unit"`` (the open
    interval (0, 1)) or ``"simplex"`` (a length-K probability vector).
``posterior_parameters(data)``, ``posterior(data)``
    Exact posterior as a dict of parameters and as a frozen ``scipy.stats`` distribution.
``posterior_mean(data)``, ``posterior_cov(data)``
    Numpy float64 arrays of shape ``(d,)`` and ``(d, d)`` over the flattened theta (``d = 1``
    for the scalar families, ``K`` for the Dirichlet, ``p`` for the regression weights).
``prior()``
    Frozen ``scipy.stats`` prior.
``simulate(key, num_obs)``
    ``(theta, data)`` with ``theta`` drawn from the prior and ``data`` from the model given
    ``theta`` (jax arrays; counts are int32).
``draw_posterior(key, data, num=None)``
    Exact posterior draw(s) as a theta pytree (leading axis ``num`` when given).
``instances(max_obs=8)``
    Class method: a hypothesis strategy of random ``(model, data)`` pairs.

The closed forms are the standard conjugate updates ("Bayesian Data Analysis", 3rd ed.
(2013), ch. 2-3; "Pattern Recognition and Machine Learning" (2006), sec. 3.3).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, ClassVar

import jax
import jax.numpy as jnp
import numpy as np
import scipy.stats
from jax.scipy import stats as jstats

if TYPE_CHECKING:  # pragma: no cover - hypothesis is a test dependency
    from hypothesis.strategies import SearchStrategy

__all__ = [
    "CLOSED_FORM_MODELS",
    "BetaBinomial",
    "ClosedFormModel",
    "DirichletMultinomial",
    "GammaPoisson",
    "LinearRegressionKnownNoise",
    "NormalKnownVariance",
]

Theta = dict[str, Any]  # {parameter name: leaf}; a batch of draws adds a leading axis
Data = dict[str, Any]  # {field name: array}; rows along the leading axis


# ----------------------------------------------------------------------------- helpers
def _positive(name: str, value) -> float:
    v = float(value)
    if not (np.isfinite(v) and v > 0):
        raise ValueError(f"{name}: expected a finite positive number; got {value!r}")
    return v


def _finite(name: str, value) -> float:
    v = float(value)
    if not np.isfinite(v):
        raise ValueError(f"{name}: expected a finite number; got {value!r}")
    return v


def _field(data, name: str, ndim: int | None = None) -> np.ndarray:
    if not isinstance(data, dict) or name not in data:
        raise ValueError(
            f"data: expected a dict with key '{name}'; got {type(data).__name__}"
            + (f" with keys {sorted(data)}" if isinstance(data, dict) else "")
        )
    arr = np.asarray(data[name])
    if ndim is not None and arr.ndim != ndim:
        raise ValueError(f"data['{name}']: expected {ndim} axes; got shape {arr.shape}")
    return arr


def _like(x, ref) -> jax.Array:
    """``x`` as a jax array in the floating dtype of ``ref``."""
    ref = jnp.asarray(ref)
    dtype = ref.dtype if jnp.issubdtype(ref.dtype, jnp.floating) else jnp.result_type(float)
    return jnp.asarray(x, dtype=dtype)


def _leaf(theta, name: str) -> jax.Array:
    if not isinstance(theta, dict) or name not in theta:
        raise ValueError(f"theta: expected a dict with key '{name}'; got {theta!r}")
    x = jnp.asarray(theta[name])
    if not jnp.issubdtype(x.dtype, jnp.floating):
        x = x.astype(jnp.result_type(float))
    return x


def _strategies():
    import hypothesis.strategies as st

    return st


class ClosedFormModel:
    """Common interface of the closed-form families (see the module docstring)."""

    supports: ClassVar[dict[str, str]] = {}

    def log_density(self, theta: Theta, data: Data) -> jax.Array:  # pragma: no cover - abstract
        raise NotImplementedError

    def posterior_parameters(self, data: Data) -> dict[str, Any]:  # pragma: no cover
        raise NotImplementedError

    def posterior(self, data: Data) -> Any:  # pragma: no cover
        raise NotImplementedError

    def prior(self) -> Any:  # pragma: no cover
        raise NotImplementedError

    def posterior_mean(self, data: Data) -> np.ndarray:
        return np.atleast_1d(np.asarray(self.posterior(data).mean(), dtype=np.float64))

    def posterior_cov(self, data: Data) -> np.ndarray:  # pragma: no cover
        raise NotImplementedError

    def simulate(self, key: jax.Array, num_obs: int) -> tuple[Theta, Data]:  # pragma: no cover
        raise NotImplementedError

    def draw_posterior(self, key: jax.Array, data: Data, num: int | None = None) -> Theta:  # pragma: no cover
        raise NotImplementedError

    @classmethod
    def instances(cls, max_obs: int = 8) -> SearchStrategy[tuple[ClosedFormModel, Data]]:  # pragma: no cover
        raise NotImplementedError


def _num(num_obs, name="num_obs") -> int:
    if not isinstance(num_obs, (int, np.integer)) or num_obs < 1:
        raise ValueError(f"{name}: expected a positive integer; got {num_obs!r}")
    return int(num_obs)


def _shape(num):
    if num is None:
        return ()
    return (_num(num, "num"),)


# ----------------------------------------------------------------------------- normal-normal
@dataclass(frozen=True, eq=False)
class NormalKnownVariance(ClosedFormModel):
    """Normal observations with known standard deviation and a normal prior on the mean.

    ``mu ~ N(prior_mean, prior_sd^2)``, ``y_i | mu ~ N(mu, noise_sd^2)``, ``i = 1..n``.
    Posterior ("Bayesian Data Analysis" (2013), sec. 2.5):

        1 / tau_n^2 = 1 / prior_sd^2 + n / noise_sd^2,
        mu_n = tau_n^2 (prior_mean / prior_sd^2 + sum_i y_i / noise_sd^2),

    ``mu | y ~ N(mu_n, tau_n^2)``. theta: ``{"mu": scalar}``; data: ``{"y": (n,)}``.
    """

    prior_mean: float = 0.0
    prior_sd: float = 1.0
    noise_sd: float = 1.0
    supports: ClassVar[dict[str, str]] = {"mu": "real"}

    def __post_init__(self):
        object.__setattr__(self, "prior_mean", _finite("prior_mean", self.prior_mean))
        object.__setattr__(self, "prior_sd", _positive("prior_sd", self.prior_sd))
        object.__setattr__(self, "noise_sd", _positive("noise_sd", self.noise_sd))

    def log_density(self, theta: Theta, data: Data) -> jax.Array:
        mu = _leaf(theta, "mu")
        y = _like(data["y"], mu)
        return jstats.norm.logpdf(mu, self.prior_mean, self.prior_sd) + jnp.sum(
            jstats.norm.logpdf(y, mu, self.noise_sd)
        )

    def posterior_parameters(self, data: Data) -> dict[str, Any]:
        y = _field(data, "y", 1).astype(np.float64)
        precision = 1.0 / self.prior_sd**2 + y.size / self.noise_sd**2
        mean = (self.prior_mean / self.prior_sd**2 + y.sum() / self.noise_sd**2) / precision
        return {"mean": float(mean), "sd": float(np.sqrt(1.0 / precision))}

    def posterior(self, data: Data) -> Any:
        p = self.posterior_parameters(data)
        return scipy.stats.norm(loc=p["mean"], scale=p["sd"])

    def prior(self) -> Any:
        return scipy.stats.norm(loc=self.prior_mean, scale=self.prior_sd)

    def posterior_cov(self, data: Data) -> np.ndarray:
        return np.array([[self.posterior_parameters(data)["sd"] ** 2]])

    def simulate(self, key: jax.Array, num_obs: int) -> tuple[Theta, Data]:
        n = _num(num_obs)
        k_mu, k_y = jax.random.split(key)
        mu = self.prior_mean + self.prior_sd * jax.random.normal(k_mu, ())
        y = mu + self.noise_sd * jax.random.normal(k_y, (n,))
        return {"mu": mu}, {"y": y}

    def draw_posterior(self, key: jax.Array, data: Data, num: int | None = None) -> Theta:
        p = self.posterior_parameters(data)
        return {"mu": p["mean"] + p["sd"] * jax.random.normal(key, _shape(num))}

    @classmethod
    def instances(cls, max_obs: int = 8) -> SearchStrategy[tuple[ClosedFormModel, Data]]:
        st = _strategies()

        @st.composite
        def build(draw):
            model = cls(
                prior_mean=draw(st.floats(-5.0, 5.0)),
                prior_sd=draw(st.floats(0.1, 10.0)),
                noise_sd=draw(st.floats(0.1, 5.0)),
            )
            y = draw(st.lists(st.floats(-20.0, 20.0), min_size=1, max_size=max_obs))
            return model, {"y": np.asarray(y, dtype=np.float64)}

        return build()


# ----------------------------------------------------------------------------- beta-binomial
@dataclass(frozen=True, eq=False)
class BetaBinomial(ClosedFormModel):
    """Binomial counts with a beta prior on the success probability.

    ``p ~ Beta(a, b)``, ``k_j | p ~ Binomial(n_j, p)``, ``j = 1..m``. Posterior
    ("Bayesian Data Analysis" (2013), sec. 2.4): ``p | k ~ Beta(a + sum k_j,
    b + sum (n_j - k_j))``. theta: ``{"p": scalar}`` in (0, 1); data:
    ``{"successes": (m,), "trials": (m,)}`` (integers).
    """

    a: float = 1.0
    b: float = 1.0
    supports: ClassVar[dict[str, str]] = {"p": "unit"}

    def __post_init__(self):
        object.__setattr__(self, "a", _positive("a", self.a))
        object.__setattr__(self, "b", _positive("b", self.b))

    def log_density(self, theta: Theta, data: Data) -> jax.Array:
        p = _leaf(theta, "p")
        k = jnp.asarray(data["successes"])
        n = jnp.asarray(data["trials"])
        return jstats.beta.logpdf(p, self.a, self.b) + jnp.sum(jstats.binom.logpmf(k, n, p))

    def _counts(self, data: Data) -> tuple[np.ndarray, np.ndarray]:
        k = _field(data, "successes", 1).astype(np.float64)
        n = _field(data, "trials", 1).astype(np.float64)
        if k.shape != n.shape:
            raise ValueError(f"data: 'successes' and 'trials' must have the same shape; got {k.shape} and {n.shape}")
        if np.any(k < 0) or np.any(k > n):
            raise ValueError("data: expected 0 <= successes <= trials in every row")
        return k, n

    def posterior_parameters(self, data: Data) -> dict[str, Any]:
        k, n = self._counts(data)
        return {"a": float(self.a + k.sum()), "b": float(self.b + (n - k).sum())}

    def posterior(self, data: Data) -> Any:
        p = self.posterior_parameters(data)
        return scipy.stats.beta(p["a"], p["b"])

    def prior(self) -> Any:
        return scipy.stats.beta(self.a, self.b)

    def posterior_cov(self, data: Data) -> np.ndarray:
        return np.array([[float(self.posterior(data).var())]])

    def simulate(self, key: jax.Array, num_obs: int, trials: int = 10) -> tuple[Theta, Data]:
        """Draw ``p`` from the prior and ``num_obs`` rows of ``trials`` Bernoulli trials."""
        m = _num(num_obs)
        t = _num(trials, "trials")
        k_p, k_k = jax.random.split(key)
        p = jax.random.beta(k_p, self.a, self.b, shape=())
        n = jnp.full((m,), t, dtype=jnp.int32)
        # a Binomial(t, p) count as a sum of t Bernoulli(p) trials: exact, cheap to compile
        k = jnp.sum(jax.random.uniform(k_k, (m, t), p.dtype) < p, axis=1, dtype=jnp.int32)
        return {"p": p}, {"successes": k, "trials": n}

    def draw_posterior(self, key: jax.Array, data: Data, num: int | None = None) -> Theta:
        q = self.posterior_parameters(data)
        return {"p": jax.random.beta(key, q["a"], q["b"], shape=_shape(num))}

    @classmethod
    def instances(cls, max_obs: int = 8) -> SearchStrategy[tuple[ClosedFormModel, Data]]:
        st = _strategies()

        @st.composite
        def build(draw):
            model = cls(a=draw(st.floats(0.5, 10.0)), b=draw(st.floats(0.5, 10.0)))
            trials = draw(st.lists(st.integers(1, 30), min_size=1, max_size=max_obs))
            succ = [draw(st.integers(0, t)) for t in trials]
            return model, {
                "successes": np.asarray(succ, dtype=np.int32),
                "trials": np.asarray(trials, dtype=np.int32),
            }

        return build()


# ----------------------------------------------------------------------------- gamma-Poisson
@dataclass(frozen=True, eq=False)
class GammaPoisson(ClosedFormModel):
    """Poisson counts with a gamma prior (shape, rate) on the intensity.

    ``lam ~ Gamma(shape, rate)`` (density ``propto lam^(shape-1) exp(-rate lam)``),
    ``y_i | lam ~ Poisson(lam)``. Posterior ("Bayesian Data Analysis" (2013), sec. 2.6):
    ``lam | y ~ Gamma(shape + sum y_i, rate + n)``. theta: ``{"lam": scalar}`` > 0;
    data: ``{"counts": (n,)}`` (integers).
    """

    shape: float = 1.0
    rate: float = 1.0
    supports: ClassVar[dict[str, str]] = {"lam": "positive"}

    def __post_init__(self):
        object.__setattr__(self, "shape", _positive("shape", self.shape))
        object.__setattr__(self, "rate", _positive("rate", self.rate))

    def log_density(self, theta: Theta, data: Data) -> jax.Array:
        lam = _leaf(theta, "lam")
        y = jnp.asarray(data["counts"])
        return jstats.gamma.logpdf(lam, self.shape, scale=1.0 / self.rate) + jnp.sum(jstats.poisson.logpmf(y, lam))

    def posterior_parameters(self, data: Data) -> dict[str, Any]:
        y = _field(data, "counts", 1).astype(np.float64)
        if np.any(y < 0):
            raise ValueError("data['counts']: expected non-negative counts")
        return {"shape": float(self.shape + y.sum()), "rate": float(self.rate + y.size)}

    def posterior(self, data: Data) -> Any:
        p = self.posterior_parameters(data)
        return scipy.stats.gamma(p["shape"], scale=1.0 / p["rate"])

    def prior(self) -> Any:
        return scipy.stats.gamma(self.shape, scale=1.0 / self.rate)

    def posterior_cov(self, data: Data) -> np.ndarray:
        return np.array([[float(self.posterior(data).var())]])

    def simulate(self, key: jax.Array, num_obs: int) -> tuple[Theta, Data]:
        n = _num(num_obs)
        k_l, k_y = jax.random.split(key)
        lam = jax.random.gamma(k_l, self.shape, shape=()) / self.rate
        y = jax.random.poisson(k_y, lam, shape=(n,)).astype(jnp.int32)
        return {"lam": lam}, {"counts": y}

    def draw_posterior(self, key: jax.Array, data: Data, num: int | None = None) -> Theta:
        p = self.posterior_parameters(data)
        return {"lam": jax.random.gamma(key, p["shape"], shape=_shape(num)) / p["rate"]}

    @classmethod
    def instances(cls, max_obs: int = 8) -> SearchStrategy[tuple[ClosedFormModel, Data]]:
        st = _strategies()

        @st.composite
        def build(draw):
            model = cls(shape=draw(st.floats(0.5, 10.0)), rate=draw(st.floats(0.1, 5.0)))
            y = draw(st.lists(st.integers(0, 50), min_size=1, max_size=max_obs))
            return model, {"counts": np.asarray(y, dtype=np.int32)}

        return build()


# ----------------------------------------------------------------------------- Dirichlet-multinomial
@dataclass(frozen=True, eq=False)
class DirichletMultinomial(ClosedFormModel):
    """Multinomial count vectors with a Dirichlet prior on the category probabilities.

    ``probs ~ Dirichlet(alpha)``, ``c_j | probs ~ Multinomial(sum_k c_jk, probs)``. Posterior
    ("Bayesian Data Analysis" (2013), sec. 3.4): ``probs | c ~ Dirichlet(alpha + sum_j c_j)``.

    theta: ``{"probs": (K,)}`` on the simplex; data: ``{"counts": (m, K)}`` (integers).
    ``log_density`` reads only the first ``K - 1`` entries of ``probs`` and takes the last
    as ``1 - sum`` of them, so it is the Dirichlet density of the first ``K - 1``
    coordinates (finite on the open set where they are positive and sum below 1) and its
    derivative with respect to the last entry is zero. This is the density that a simplex
    transform with its Jacobian taken with respect to the first ``K - 1`` entries expects.
    Posterior mean and covariance are over all ``K`` entries (the covariance is singular).
    """

    alpha: Any = field(default_factory=lambda: np.ones(3))
    supports: ClassVar[dict[str, str]] = {"probs": "simplex"}

    def __post_init__(self):
        a = np.asarray(self.alpha, dtype=np.float64)
        if a.ndim != 1 or a.size < 2 or not np.all(np.isfinite(a)) or np.any(a <= 0):
            raise ValueError(f"alpha: expected a 1-D array of at least 2 positive numbers; got {self.alpha!r}")
        object.__setattr__(self, "alpha", a)

    @property
    def categories(self) -> int:
        return int(self.alpha.size)

    def log_density(self, theta: Theta, data: Data) -> jax.Array:
        probs = _leaf(theta, "probs")
        if probs.shape != (self.categories,):
            raise ValueError(f"theta['probs']: expected shape ({self.categories},); got {probs.shape}")
        head = probs[:-1]
        full = jnp.concatenate([head, 1.0 - jnp.sum(head, keepdims=True)])
        counts = jnp.asarray(data["counts"])
        if counts.ndim == 1:
            counts = counts[None, :]
        prior = jstats.dirichlet.logpdf(head, _like(self.alpha, probs))
        rows = jax.vmap(lambda c: jstats.multinomial.logpmf(c, jnp.sum(c), full))(counts)
        return prior + jnp.sum(rows)

    def _counts(self, data: Data) -> np.ndarray:
        c = np.atleast_2d(_field(data, "counts")).astype(np.float64)
        if c.ndim != 2 or c.shape[1] != self.categories:
            raise ValueError(f"data['counts']: expected shape (m, {self.categories}); got {c.shape}")
        if np.any(c < 0):
            raise ValueError("data['counts']: expected non-negative counts")
        return c

    def posterior_parameters(self, data: Data) -> dict[str, Any]:
        return {"alpha": self.alpha + self._counts(data).sum(axis=0)}

    def posterior(self, data: Data) -> Any:
        return scipy.stats.dirichlet(self.posterior_parameters(data)["alpha"])

    def prior(self) -> Any:
        return scipy.stats.dirichlet(self.alpha)

    def posterior_cov(self, data: Data) -> np.ndarray:
        a = self.posterior_parameters(data)["alpha"]
        a0 = a.sum()
        m = a / a0
        return (np.diag(m) - np.outer(m, m)) / (a0 + 1.0)

    def simulate(self, key: jax.Array, num_obs: int, draws_per_row: int = 10) -> tuple[Theta, Data]:
        """Draw ``probs`` from the prior and ``num_obs`` count rows of ``draws_per_row``
        categorical draws each."""
        m = _num(num_obs)
        t = _num(draws_per_row, "draws_per_row")
        k_p, k_c = jax.random.split(key)
        probs = jax.random.dirichlet(k_p, jnp.asarray(self.alpha, dtype=jnp.result_type(float)), shape=())
        # a Multinomial(t, probs) row as category counts of t independent categorical draws
        labels = jax.random.categorical(k_c, jnp.log(probs), shape=(m, t))
        counts = jnp.sum(jax.nn.one_hot(labels, self.categories, dtype=jnp.int32), axis=1)
        return {"probs": probs}, {"counts": counts}

    def draw_posterior(self, key: jax.Array, data: Data, num: int | None = None) -> Theta:
        a = jnp.asarray(self.posterior_parameters(data)["alpha"], dtype=jnp.result_type(float))
        return {"probs": jax.random.dirichlet(key, a, shape=_shape(num))}

    @classmethod
    def instances(cls, max_obs: int = 8) -> SearchStrategy[tuple[ClosedFormModel, Data]]:
        st = _strategies()

        @st.composite
        def build(draw):
            k = draw(st.integers(2, 4))
            alpha = draw(st.lists(st.floats(0.5, 5.0), min_size=k, max_size=k))
            m = draw(st.integers(1, max_obs))
            counts = [draw(st.lists(st.integers(0, 10), min_size=k, max_size=k)) for _ in range(m)]
            return cls(alpha=np.asarray(alpha)), {"counts": np.asarray(counts, dtype=np.int32)}

        return build()


# ----------------------------------------------------------------------------- linear regression
@dataclass(frozen=True, eq=False)
class LinearRegressionKnownNoise(ClosedFormModel):
    """Linear regression with known noise and a Gaussian prior on the weights.

    ``w ~ N(m_0, S_0)``, ``y_i | w ~ N(x_i^T w, noise_sd^2)``. Posterior ("Pattern
    Recognition and Machine Learning" (2006), eqs. 3.49-3.51), with ``beta = 1/noise_sd^2``:

        S_N^{-1} = S_0^{-1} + beta X^T X,     m_N = S_N (S_0^{-1} m_0 + beta X^T y),

    ``w | y ~ N(m_N, S_N)``. theta: ``{"w": (p,)}``; data: ``{"X": (n, p), "y": (n,)}``.
    """

    prior_mean: Any = field(default_factory=lambda: np.zeros(2))
    prior_cov: Any = field(default_factory=lambda: np.eye(2))
    noise_sd: float = 1.0
    supports: ClassVar[dict[str, str]] = {"w": "real"}

    def __post_init__(self):
        m = np.asarray(self.prior_mean, dtype=np.float64)
        s = np.asarray(self.prior_cov, dtype=np.float64)
        if m.ndim != 1 or m.size < 1 or not np.all(np.isfinite(m)):
            raise ValueError(f"prior_mean: expected a finite 1-D array; got {self.prior_mean!r}")
        if s.shape != (m.size, m.size) or not np.allclose(s, s.T):
            raise ValueError(f"prior_cov: expected a symmetric ({m.size}, {m.size}) matrix; got shape {s.shape}")
        if np.linalg.eigvalsh(s).min() <= 0:
            raise ValueError("prior_cov: expected a positive-definite matrix")
        object.__setattr__(self, "prior_mean", m)
        object.__setattr__(self, "prior_cov", s)
        object.__setattr__(self, "noise_sd", _positive("noise_sd", self.noise_sd))

    @property
    def num_weights(self) -> int:
        return int(self.prior_mean.size)

    def log_density(self, theta: Theta, data: Data) -> jax.Array:
        w = _leaf(theta, "w")
        X = _like(data["X"], w)
        y = _like(data["y"], w)
        prior = jstats.multivariate_normal.logpdf(w, _like(self.prior_mean, w), _like(self.prior_cov, w))
        # jax annotates multivariate_normal.logpdf as returning ArrayLike; it returns an Array
        return prior + jnp.sum(jstats.norm.logpdf(y, X @ w, self.noise_sd))  # pyright: ignore[reportReturnType]

    def posterior_parameters(self, data: Data) -> dict[str, Any]:
        X = _field(data, "X", 2).astype(np.float64)
        y = _field(data, "y", 1).astype(np.float64)
        if X.shape != (y.size, self.num_weights):
            raise ValueError(
                f"data: expected X of shape (n, {self.num_weights}) with n = len(y) = {y.size}; "
                f"got X of shape {X.shape}"
            )
        prec0 = np.linalg.inv(self.prior_cov)
        beta = 1.0 / self.noise_sd**2
        cov = np.linalg.inv(prec0 + beta * X.T @ X)
        cov = 0.5 * (cov + cov.T)
        mean = cov @ (prec0 @ self.prior_mean + beta * X.T @ y)
        return {"mean": mean, "cov": cov}

    def posterior(self, data: Data) -> Any:
        p = self.posterior_parameters(data)
        return scipy.stats.multivariate_normal(mean=p["mean"], cov=p["cov"])

    def prior(self) -> Any:
        return scipy.stats.multivariate_normal(mean=self.prior_mean, cov=self.prior_cov)

    def posterior_mean(self, data: Data) -> np.ndarray:
        return self.posterior_parameters(data)["mean"]

    def posterior_cov(self, data: Data) -> np.ndarray:
        return self.posterior_parameters(data)["cov"]

    def simulate(self, key: jax.Array, num_obs: int) -> tuple[Theta, Data]:
        n = _num(num_obs)
        k_w, k_x, k_y = jax.random.split(key, 3)
        dt = jnp.result_type(float)
        w = jax.random.multivariate_normal(k_w, jnp.asarray(self.prior_mean, dt), jnp.asarray(self.prior_cov, dt))
        X = jax.random.normal(k_x, (n, self.num_weights), dt)
        y = X @ w + self.noise_sd * jax.random.normal(k_y, (n,), dt)
        return {"w": w}, {"X": X, "y": y}

    def draw_posterior(self, key: jax.Array, data: Data, num: int | None = None) -> Theta:
        p = self.posterior_parameters(data)
        dt = jnp.result_type(float)
        return {
            "w": jax.random.multivariate_normal(
                key, jnp.asarray(p["mean"], dt), jnp.asarray(p["cov"], dt), shape=_shape(num)
            )
        }

    @classmethod
    def instances(cls, max_obs: int = 8) -> SearchStrategy[tuple[ClosedFormModel, Data]]:
        st = _strategies()

        @st.composite
        def build(draw):
            p = draw(st.integers(1, 3))
            mean = draw(st.lists(st.floats(-2.0, 2.0), min_size=p, max_size=p))
            L = np.asarray(draw(st.lists(st.floats(-1.0, 1.0), min_size=p * p, max_size=p * p))).reshape(p, p)
            model = cls(
                prior_mean=np.asarray(mean),
                prior_cov=L @ L.T + 0.1 * np.eye(p),
                noise_sd=draw(st.floats(0.2, 3.0)),
            )
            n = draw(st.integers(1, max_obs))
            X = np.asarray(draw(st.lists(st.floats(-3.0, 3.0), min_size=n * p, max_size=n * p))).reshape(n, p)
            y = np.asarray(draw(st.lists(st.floats(-10.0, 10.0), min_size=n, max_size=n)))
            return model, {"X": X, "y": y}

        return build()


#: All closed-form families, for parametrised tests.
CLOSED_FORM_MODELS = (
    NormalKnownVariance,
    BetaBinomial,
    GammaPoisson,
    DirichletMultinomial,
    LinearRegressionKnownNoise,
)
