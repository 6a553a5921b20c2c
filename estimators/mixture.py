"""Online Gaussian mixture by stepwise EM with exponential forgetting, and its quantiles."""

from __future__ import annotations

import math
from typing import Literal

import numpy as np

from .errors import DomainError, IncompatibleError, ShapeError
from .forgetting import HalfLife, age_to, batch_exponent, copy_state, scale_step, take_batch
from .mixture_cdf import normal_mixture_cdf, normal_mixture_quantile
from .mixture_moves import proposals
from .mixture_reduce import runnalls_reduce
from .validation import check_batch, check_saved, saved_exponent

CovarianceType = Literal["full", "diag"]
_LOG_2PI = math.log(2.0 * math.pi)
_RESEED_WEIGHT = 0.5    # a re-seeded component starts with this share of 1/K
_RESOLUTION = 2.0 ** -60  # a constant field's floor sd, relative to its value (_floor_for)
_MOVE_EVERY = 64         # a split-and-merge check after this many windows of new rows,
_MOVE_BACKOFF = 4        # doubled after each quiet check, up to 2**_MOVE_BACKOFF times
_MOVE_ITER = 4           # EM iterations on the window for each side of the comparison
_MOVE_GAIN = 0.002       # nats per window row a proposal must gain to be kept
_MOVE_OVERLAP = 0.3      # responsibility overlap of two components that calls for a check
_TINY_VARIANCE = 1e-100  # 1/floor times a squared difference (<= 4e200) stays finite


class Mixture:
    """Gaussian mixture of K components fitted online, with forgetting and quantiles.

    Parameters
    ----------
    components : int
        Number of components K (>= 1).
    dim : int
        Number of fields per observation (d >= 1).
    covariance : {"full", "diag"}
        Full covariance matrices or per-field variances only.
    log : bool
        Fit log(x) (every value must be > 0); quantiles and ``cdf`` stay in the
        original units, ``loglik`` is the density of x itself.
    half_life : HalfLife or None
        Forgetting, exactly as for ``Moments``; None keeps every observation.
    warmup : int
        Rows buffered before the mixture is initialised (>= K). Until then
        ``warm`` is False and read-outs come from a single Gaussian fitted to
        the buffer.
    seed : int
        Seed of the initialisation; the fit is deterministic given the seed
        and the data.
    n_init : int
        Number of k-means++ starts at initialisation; the best is kept.
    init_iter : int
        Batch EM iterations per start.
    min_weight : float
        A component whose weight falls below this share is re-seeded.
    reg : float
        Covariance floor, as a fraction of each field's variance in the
        warm-up data, added to every component's covariance. A field that is
        constant in the warm-up data gets the float resolution of its value
        instead, so constant data has quantiles equal to the constant.
    recent : int
        Number of most recent rows kept as re-seeding candidates and as the
        window on which split-and-merge moves are judged.

    Notes
    -----
    The fitted model is p(y) = sum_k pi_k N(y; mu_k, Sigma_k) with y = x, or
    y = log x when ``log``. Maximum likelihood has no closed form (a sum
    inside the logarithm); this is the stepwise (online) EM of Cappé and
    Moulines (2009) on mini-batches: for a batch of rows y_i with weights
    v_i (the caller's weights times the forgetting factors)

    - E-step, vectorised with log-sum-exp under the current parameters:
      r_ik = v_i pi_k N(y_i; mu_k, Sigma_k) / p(y_i);
    - the per-component weighted sufficient statistics (weight W_k, mean,
      centred scatter) are decayed by the half-life clock exactly as in
      ``Moments`` and the batch's are folded in with the Chan-Golub-LeVeque
      pairwise update (centred, never raw sums of squares);
    - M-step in closed form: pi_k = W_k / sum W, mu_k = mean_k,
      Sigma_k = scatter_k / W_k + floor.

    The step size of the stochastic approximation is the new batch's share
    of the decayed total weight: 1/n without forgetting, about ln 2 / h per
    observation with a half-life of h observations.

    Initialisation: k-means++ seeding (Arthur and Vassilvitskii 2007) of the
    weighted warm-up buffer, hard assignment, then ``init_iter`` batch EM
    iterations; the best of ``n_init`` starts by log-likelihood is kept.

    Stability: after each step a component whose weight share is below
    ``min_weight`` or whose variance in some field falls below the floor is
    re-seeded at the recent row the other components explain worst (lowest
    log-likelihood), with the weight-averaged covariance of the healthy
    components and half of 1/K of the weight; ``reseeds`` counts these.
    Components are never relabelled: index k is the same component between
    reads (``merge`` and ``reduce`` document how they order theirs). A
    collapse is not called when the recent rows are all one value.

    Drift recovery: every ``64 * recent`` rows (twice as long after each check
    that kept the fit, up to 16 times; back to 64 after a move), when a
    component is stranded (its share of the recent rows under half its
    weight) or two overlap (cosine of their responsibilities above 0.3),
    split-and-merge proposals
    (``mixture_moves``: free the lightest component or merge the cheapest
    Runnalls pair, split the widest heavy one along its principal axis) and the
    current fit each get 4 batch EM iterations on the recent rows; the best
    proposal replaces the fit when it explains those rows better by 0.002 nats
    a row, and counts in ``reseeds``. This frees a fit that followed a drifting
    stream into a local optimum (a stranded component, two sharing a mode, one
    covering two), which EM alone never leaves (Ueda et al. 2000).

    With ``log``, ``means``, ``covariances``, ``stddevs`` and
    ``average_loglik`` are in the fitted (log) space; ``original_means`` and
    ``original_stddevs`` give each component's log-normal marginal mean and
    standard deviation in the original units.

    Costs: ``update`` O(n K d**2 + K d**3) for a batch of n; initialisation
    O(n_init * init_iter * n K d**2) once; ``quantile`` O(K) per iteration,
    about 10 iterations; ``reduce`` O(K**3 d**3).

    References
    ----------
    Cappé, O., Moulines, E. (2009). On-line expectation-maximization
    algorithm for latent data models. Journal of the Royal Statistical
    Society B 71(3), 593-613.
    Neal, R. M., Hinton, G. E. (1998). A view of the EM algorithm that
    justifies incremental, sparse, and other variants. In Learning in
    Graphical Models, 355-368.
    Arthur, D., Vassilvitskii, S. (2007). k-means++: the advantages of
    careful seeding. Proceedings of SODA, 1027-1035.
    Chan, T. F., Golub, G. H., LeVeque, R. J. (1983). Algorithms for computing
    the sample variance. The American Statistician 37(3), 242-247.
    Runnalls, A. R. (2007). Kullback-Leibler approach to Gaussian mixture
    reduction. IEEE Transactions on Aerospace and Electronic Systems 43(3).
    Ueda, N., Nakano, R., Ghahramani, Z., Hinton, G. E. (2000). SMEM algorithm
    for mixture models. Neural Computation 12(9), 2109-2128.

    Examples
    --------
    >>> rng = np.random.default_rng(1)
    >>> x = rng.permutation(np.concatenate([rng.normal(0.0, 1.0, 600),
    ...                                     rng.normal(8.0, 1.0, 400)]))
    >>> mix = Mixture(2, seed=0)
    >>> mix.update(x)
    >>> mix.warm
    True
    >>> order = np.argsort(mix.means[:, 0])
    >>> [round(float(m)) for m in mix.means[order, 0]]
    [0, 8]
    >>> [round(float(w), 1) for w in mix.weights[order]]
    [0.6, 0.4]
    >>> round(mix.quantile(0.5))      # 0.6 Phi(x) + 0.4 Phi(x - 8) = 1/2 at x = 0.97
    1
    """

    __slots__ = ("components", "dim", "covariance", "log", "half_life", "warmup", "seed",
                 "n_init", "init_iter", "min_weight", "reg", "recent", "clock", "count", "W",
                 "W2", "L", "LW", "reseeds", "warm", "_pi", "_mu", "_mu_lo", "_cov", "_floor",
                 "_buf", "_buf_w", "_recent", "_prep", "_since_check", "_quiet", "E")
    kind = "mixture"
    version = 1

    def __init__(self, components: int, dim: int = 1, covariance: CovarianceType = "full",
                 log: bool = False, half_life: HalfLife | None = None, warmup: int = 200,
                 seed: int = 0, *, n_init: int = 4, init_iter: int = 25,
                 min_weight: float = 1e-3, reg: float = 1e-6, recent: int = 512) -> None:
        _check_int("components", components, 1)
        _check_int("dim", dim, 1)
        if covariance not in ("full", "diag"):
            raise IncompatibleError("covariance", covariance, 'must be "full" or "diag"')
        if not isinstance(log, bool):
            raise IncompatibleError("log", log, "must be True or False")
        if half_life is not None and not isinstance(half_life, HalfLife):
            raise IncompatibleError("half_life", half_life, "must be a HalfLife or None")
        _check_int("warmup", warmup, components)
        _check_int("seed", seed, 0)
        _check_int("n_init", n_init, 1)
        _check_int("init_iter", init_iter, 0)
        _check_int("recent", recent, 1)
        if not (isinstance(min_weight, (int, float)) and 0.0 <= min_weight < 1.0 / components):
            raise IncompatibleError("min_weight", min_weight,
                                    f"must lie in [0, 1/components) = [0, {1.0 / components})")
        if not (isinstance(reg, (int, float)) and math.isfinite(reg) and reg > 0.0):
            raise IncompatibleError("reg", reg, "must be a finite number > 0")
        self.components, self.dim, self.covariance, self.log = components, dim, covariance, log
        self.half_life, self.warmup, self.seed = half_life, warmup, seed
        self.n_init, self.init_iter = n_init, init_iter
        self.min_weight, self.reg, self.recent = float(min_weight), float(reg), recent
        self.clock: float | None = None
        self.count = 0              # observations accepted, undecayed
        self.W = 0.0                # decayed sum of weights (the pooling weight)
        self.W2 = 0.0               # decayed sum of squared weights
        self.L = 0.0                # decayed sum of v * loglik, rows scored before their step
        self.LW = 0.0               # decayed weight of the scored rows
        self.reseeds = 0
        self.warm = False
        self._pi = np.full(components, 1.0 / components)
        self._mu = np.zeros((components, dim))
        self._mu_lo = np.zeros((components, dim))      # low-order parts: _mu + _mu_lo exact
        self._cov = np.zeros((components, dim, dim))   # raw ML covariance, before the floor
        self._floor = np.zeros(dim)
        self._buf = np.zeros((0, dim))                 # warm-up rows, fitted space
        self._buf_w = np.zeros(0)                      # their decayed weights
        self._recent = np.zeros((0, dim))              # re-seeding candidates, fitted space
        self._prep: tuple | None = None                # cached log-density constants
        self._since_check = 0                          # rows since the last move check
        self.E = 0      # W, L, LW and buffered weights are in units of 2**E, W2 of 2**(2 E)
        self._quiet = 0                                # move checks in a row that kept the fit

    # ------------------------------------------------------------------ updates
    def update(self, x: object, weights: object = None, times: object = None) -> None:
        """Fold in a batch of n rows (n, or n x d); a single observation is a batch of one.

        Raises a subclass of EstimatorError naming the value for a wrong shape,
        NaN/inf, a weight that is not finite and > 0, a non-finite time, or (with
        ``log``) a value that is not > 0 (DomainError); a rejected batch changes
        nothing. O(n K d**2 + K d**3).
        """
        b = check_batch(x, self.dim, weights, times)
        if self.log:
            check_positive(b.x)
        self._fold(b.x, b.weights, b.times)

    def _fold(self, x: np.ndarray, w: np.ndarray | None, t: np.ndarray | None) -> None:
        """Fold in rows already checked (finite, and > 0 when ``log``): the daemon's path."""
        n = x.shape[0]
        if n == 0:
            return
        y = np.log(x) if self.log else x
        v = take_batch(self, n, t, w)
        # the sums take the larger of the state's scale and the rows' (rows of weight near
        # 1 join in plain units; rows of 1e300 in units where their squares fit)
        k = 0 if v is None else batch_exponent(v)
        self._rebase(max(self.E, k) if self.W > 0.0 else k)
        if v is None:
            v = np.ones(n)
        if self.E:
            v = np.ldexp(v, -max(-2200, min(2200, self.E)))
        vsum = float(v.sum())
        if not vsum > 0.0:        # every row has decayed to nothing
            return
        if self.warm:
            self._step(y, v, vsum)
            self.W += vsum
            self.W2 += float(v @ v)
            self._recent = np.concatenate((self._recent, y[-self.recent:]))[-self.recent:]
            self._since_check += n
            if self._since_check >= (_MOVE_EVERY << self._quiet) * self.recent:
                self._since_check = 0
                moved = self._try_moves()
                self._quiet = 0 if moved else min(self._quiet + 1, _MOVE_BACKOFF)
            return
        # the warm-up fits at most ``warmup`` rows; the rest of a large first batch is
        # folded stepwise once the fit exists (initialising on all of it costs O(n) x starts)
        room = max(self.warmup - self._buf.shape[0], 0)
        hv = v[:room]
        self._buf = np.concatenate((self._buf, y[:room]))
        self._buf_w = np.concatenate((self._buf_w, hv))
        self.W += float(hv.sum())
        self.W2 += float(hv @ hv)
        self._recent = np.concatenate((self._recent, y[-self.recent:]))[-self.recent:]
        if self._buf.shape[0] >= self.warmup:
            self._initialise()
            rest, rv = y[room:], v[room:]
            rsum = float(rv.sum())
            if rsum > 0.0:
                self._step(rest, rv, rsum)
                self.W += rsum
                self.W2 += float(rv @ rv)

    def _step(self, y: np.ndarray, v: np.ndarray, vsum: float) -> None:
        """One stepwise-EM step: E-step under the current parameters, fold, M-step."""
        if self.dim == 1:
            self._step_one(y[:, 0], v, vsum)
            return
        ll, gamma = _e_step(y, self._prepared())
        self.L += float(v @ ll)
        self.LW += vsum
        a, shift, cb = _batch_stats(y, v[:, None] * gamma, self.covariance == "diag",
                                    self._mu, self._mu_lo)
        self._fold_stats(a, shift, cb, self._pi * self.W + a)

    def _step_one(self, y: np.ndarray, v: np.ndarray, vsum: float) -> None:
        """``_step`` for d = 1 on (n, K) arrays: the same arithmetic, a third of the calls."""
        _, const, mu, prec = self._prepared()
        diff = y[:, None] - mu
        ll, gamma = _logsumexp(const - 0.5 * (diff * diff) * prec)
        self.L += float(v @ ll)
        self.LW += vsum
        r = gamma * v[:, None]
        a = r.sum(axis=0)
        tot = self._pi * self.W + a
        if not (a > 0.0).all():    # rare: some component got nothing; take the general path
            self._fold_stats(a, *_batch_stats(y[:, None], r, False, self._mu,
                                              self._mu_lo)[1:], tot)
            return
        whole = (r * diff).sum(axis=0) / a      # shifted by mu: exact 0 for rows at mu
        delta = whole - self._mu_lo[:, 0]
        dev = diff - whole
        cb = (r * dev * dev).sum(axis=0)
        frac = a / tot
        keep = 1.0 - frac
        var = self._cov[:, 0, 0]
        self._move_means((delta * frac)[:, None])
        self._cov = (keep * var + cb / tot + delta * delta * keep * frac)[:, None, None]
        self._pi = tot / tot.sum()
        self._prep = None
        self._reseed_collapsed()

    def _move_means(self, step: np.ndarray) -> None:
        """Add step (K, d) to the means, kept as unevaluated sums _mu + _mu_lo (Dekker's
        Fast2Sum, exact while |mu| >= |step|: the case of an offset), so that a
        component at an offset of 1e10 keeps the digits of its spread."""
        part = self._mu_lo + step
        new = self._mu + part
        self._mu_lo = part - (new - self._mu)
        self._mu = new

    def _fold_stats(self, a: np.ndarray, shift: np.ndarray, cb: np.ndarray,
                    tot: np.ndarray) -> None:
        """Combine batch statistics (a, mean - component mean, scatter) with the decayed
        state; M-step."""
        live = tot > 0.0
        frac = np.divide(a, tot, out=np.zeros_like(a), where=live)
        keep = 1.0 - frac
        delta = np.where((a > 0.0)[:, None], shift, 0.0)
        self._move_means(delta * frac[:, None])
        self._cov = keep[:, None, None] * self._cov \
            + np.divide(cb, tot[:, None, None], out=np.zeros_like(cb),
                        where=live[:, None, None]) \
            + _outer(delta, self.covariance == "diag") * (keep * frac)[:, None, None]
        total = float(tot.sum())
        if total > 0.0:
            self._pi = tot / total
        self._prep = None
        self._reseed_collapsed()

    def _age(self, g: float) -> None:
        """Age every weight by 2**g; the parameters are ratios of weights and do not
        change."""
        k, f = scale_step(self.W, g)      # the exponent takes what would underflow
        self.E += k
        self.W *= f
        self.W2 *= f * f
        self.L *= f
        self.LW *= f
        self._buf_w = self._buf_w * f

    def _rebase(self, e: int) -> None:
        """Express the weight sums in units of 2**e (what falls below float64 there was
        outweighed by far). O(buffered rows)."""
        if e != self.E:
            k = max(-2200, min(2200, self.E - e))
            self.W, self.L, self.LW = (math.ldexp(x, k) for x in (self.W, self.L, self.LW))
            self.W2 = math.ldexp(self.W2, 2 * k)
            self._buf_w = np.ldexp(self._buf_w, k)
            self.E = e

    def decay_to(self, t: float) -> Mixture:
        """Age the state to event time t (never backwards); returns self.

        With count-based forgetting or none, time alone changes nothing. O(1).
        """
        age_to(self, t)
        return self

    # ----------------------------------------------------------- initialisation
    def _initialise(self) -> None:
        """Fit the warm-up buffer: best of ``n_init`` k-means++ starts, each refined by
        ``init_iter`` batch EM iterations. Deterministic given ``seed``."""
        y, v = self._buf, self._buf_w
        mean, cov = _weighted_gaussian(y, v)
        self._floor = _floor_for(mean, np.diagonal(cov), self.reg)
        diag = self.covariance == "diag"
        rng = np.random.default_rng(self.seed)
        best: tuple | None = None
        for _ in range(self.n_init):
            centres = _kmeans_pp(y, v, self.components, rng)
            d2 = ((y[:, None, :] - centres[None]) ** 2).sum(axis=2)
            gamma = np.zeros((y.shape[0], self.components))
            gamma[np.arange(y.shape[0]), np.argmin(d2, axis=1)] = 1.0
            params = _batch_m_step(y, v, gamma, centres, cov, diag)
            for _ in range(self.init_iter):
                _, gamma = _e_step(y, _prepare(*params[:3], self._floor, self.covariance))
                params = _batch_m_step(y, v, gamma, params[1], cov, diag)
            ll, _ = _e_step(y, _prepare(*params[:3], self._floor, self.covariance))
            score = float(v @ ll)
            if best is None or score > best[0]:
                best = (score, params, ll)
        assert best is not None
        score, (self._pi, self._mu, self._cov, self._mu_lo), _ = best
        self.L, self.LW = score, float(v.sum())
        self.warm = True
        self._buf = np.zeros((0, self.dim))
        self._buf_w = np.zeros(0)
        self._prep = None
        self._reseed_collapsed()

    # ---------------------------------------------------------------- stability
    def _reseed_collapsed(self) -> None:
        """Re-seed components whose weight or variance has collapsed, one at a time,
        each where the mixture of the healthy components fits the recent rows worst."""
        var = np.diagonal(self._cov, axis1=1, axis2=2)
        sick = self._pi < self.min_weight
        narrow = (var < self._floor).any(axis=1)
        # a component narrower than the floor has collapsed onto a spike, unless the
        # recent rows are all one value: then the data itself is constant
        if narrow.any() and self._recent.shape[0] and np.ptp(self._recent, axis=0).any():
            sick |= narrow
        self._reseed(sick)

    def _reseed(self, sick: np.ndarray) -> None:
        """Re-seed the components marked ``sick`` (K,), as ``_reseed_collapsed`` says."""
        if not sick.any() or self._recent.shape[0] == 0:
            return
        for k in np.flatnonzero(sick):
            healthy = ~sick
            lp = _log_prob(self._recent, self._prepared())
            lp[:, ~healthy] = -np.inf
            with np.errstate(invalid="ignore"):
                worst = int(np.argmin(_logsumexp(lp)[0])) if healthy.any() else 0
            hw = self._pi[healthy]
            if hw.sum() > 0.0:
                cov = np.tensordot(hw / hw.sum(), self._cov[healthy], axes=1)
            else:
                cov = np.diag(self._floor / self.reg)
            share = _RESEED_WEIGHT / self.components
            rest = self._pi.sum() - self._pi[k]
            self._pi = self._pi * ((1.0 - share) / rest) if rest > 0.0 else \
                np.full(self.components, (1.0 - share) / (self.components - 1 or 1))
            self._pi[k] = share if self.components > 1 else 1.0
            self._mu[k] = self._recent[worst]
            self._mu_lo[k] = 0.0
            self._cov[k] = cov + np.diag(self._floor)
            sick[k] = False
            self.reseeds += 1
            self._prep = None

    # ------------------------------------------------------------ drift recovery
    def _try_moves(self) -> bool:
        """Split-and-merge check (``mixture_moves``): keep the best proposal when, after
        ``_MOVE_ITER`` EM iterations on the recent rows, its log-likelihood there beats
        the current fit's, refined the same way, by ``_MOVE_GAIN`` nats per row. True when
        the fit was replaced."""
        y = self._recent
        n = y.shape[0]
        if self.components < 2 or n < self.recent:
            return False
        # a cheap look first (one E-step): proposals are tried only when a component is
        # stranded (its share of the window under half its weight, or its weight near
        # min_weight) or two overlap (Ueda et al.'s merge criterion, cosine of their
        # responsibility columns)
        gamma = _e_step(y, self._prepared())[1]
        # a component that should hold 10 of the window's rows and holds none is
        # stranded (left behind by a drift, or fitted to one absurd row): re-seed it
        dead = (self._pi * n >= 10.0) & (gamma.sum(axis=0) < 1.0)
        if dead.any():
            self._reseed(dead)
            return True
        norms = np.sqrt((gamma * gamma).sum(axis=0))
        with np.errstate(divide="ignore", invalid="ignore"):
            overlap = (gamma.T @ gamma) / np.outer(norms, norms)
        np.fill_diagonal(overlap, 0.0)
        stranded = (gamma.mean(axis=0) < 0.5 * self._pi) | (self._pi < 10.0 * self.min_weight)
        if not stranded.any() and not np.nanmax(overlap) > _MOVE_OVERLAP:
            return False
        v = np.ones(n)
        diag = self.covariance == "diag"
        data_cov = _weighted_gaussian(y, v)[1]
        best_ll, _ = self._refine(y, v, (self._pi, self._mu, self._cov), data_cov, diag)
        threshold = best_ll + _MOVE_GAIN * n
        chosen = None
        for start in proposals(self._pi, self._mu, self._cov, self._floor, diag):
            ll, params = self._refine(y, v, start, data_cov, diag)
            if ll > threshold:
                threshold, chosen = ll, params
        if chosen is None:
            return False
        self._pi, self._mu, self._cov, self._mu_lo = chosen
        self.reseeds += 1
        self._prep = None
        return True

    def _refine(self, y: np.ndarray, v: np.ndarray, start: tuple, data_cov: np.ndarray,
                diag: bool) -> tuple[float, tuple]:
        """``_MOVE_ITER`` batch EM iterations on rows y from (pi, mu, cov): (total
        log-likelihood of the result, (pi, mu, cov, mu_lo))."""
        params = (start[0], start[1], start[2], np.zeros_like(start[1]))
        for _ in range(_MOVE_ITER):
            _, gamma = _e_step(y, _prepare(*params[:3], self._floor, self.covariance))
            if not np.isfinite(gamma).all():
                return -math.inf, params
            params = _batch_m_step(y, v, gamma, params[1], data_cov, diag)
        ll, _ = _e_step(y, _prepare(*params[:3], self._floor, self.covariance))
        return float(v @ ll), params

    # ------------------------------------------------------------------ pooling
    def merge(self, other: Mixture) -> Mixture:
        """Fold another state in, exactly as the weighted mixture of both; returns self.

        ``other`` is not changed; like ``Moments.merge`` and ``Regression.merge``
        this one changes ``self`` in place (``a.copy().merge(b)`` keeps ``a``).

        Both states are first aged to the later clock (with count-based
        forgetting the clocks add, as for ``Moments``). Each warm state
        contributes its K components with weights pi_k W, so the result is
        exactly the weighted mixture of the two distributions, with
        K_self + K_other components (self's first, in order). A warming state
        with data contributes its single Gaussian as one component; two warming
        states pool their buffers (and initialise if together they reach
        ``warmup``). Apply ``reduce(K)`` to bring the count back down.
        O((K_self + K_other) d**2).
        """
        if not isinstance(other, Mixture) or (other.dim, other.covariance, other.log,
                                              other.half_life) != (self.dim, self.covariance,
                                                                   self.log, self.half_life):
            raise IncompatibleError("other", getattr(other, "dim", other),
                                    "must be a Mixture of the same dim, covariance type, "
                                    "log flag and half-life")
        a, b = self.copy(), other.copy()
        if self.half_life is not None and self.half_life.by_count:
            clock = (a.clock or 0.0) + (b.clock or 0.0)
        else:
            if b.clock is not None:
                a.decay_to(b.clock)
            if a.clock is not None:
                b.decay_to(a.clock)
            clock = a.clock
        e = max(a.E if a.W > 0.0 else b.E, b.E if b.W > 0.0 else a.E)
        a._rebase(e)
        b._rebase(e)
        if not a.warm and not b.warm:
            out = a
            out._buf = np.concatenate((a._buf, b._buf))
            out._buf_w = np.concatenate((a._buf_w, b._buf_w))
        else:
            parts = [p for p in (a._as_components(), b._as_components()) if p is not None]
            floor = np.min([p[3] for p in parts], axis=0)
            wk = np.concatenate([p[0] for p in parts])
            k = wk.shape[0]
            out = a._like(k, max(self.warmup, k))
            out._pi = wk / wk.sum() if wk.sum() > 0.0 else np.full(k, 1.0 / k)
            out._mu = np.concatenate([p[1] for p in parts])
            # fold any floor above the pooled one into the raw covariance: covariances unchanged
            out._cov = np.concatenate([p[2] + np.diag(p[3] - floor) for p in parts])
            out._floor = floor
            out.warm = True
            out.L, out.LW = a.L + b.L, a.LW + b.LW
        out.clock = clock
        out.count = a.count + b.count
        out.W, out.W2, out.E = a.W + b.W, a.W2 + b.W2, e
        out.reseeds = a.reseeds + b.reseeds
        out._recent = np.concatenate((a._recent, b._recent))[-self.recent:]
        out._prep = None
        if not out.warm and out._buf.shape[0] >= out.warmup:
            out._initialise()
        for name in self.__slots__:
            setattr(self, name, getattr(out, name))
        return self

    def _as_components(self) -> tuple | None:
        """(absolute weights, means, raw covariances, floor) of this state's model."""
        if self.warm:
            return self._pi * self.W, self._mu, self._cov, self._floor
        single = self._single()
        if single is None:
            return None
        mean, cov, floor = single
        return np.array([self.W]), mean[None], cov[None], floor

    def reduce(self, components: int) -> Mixture:
        """A new Mixture of at most ``components`` components by Runnalls' greedy merging.

        The overall mean and covariance of the mixture are preserved exactly
        (up to rounding); a merged pair takes the lower index of the two and
        the other components keep their order. A warming state, or one with
        no more components than asked, is returned as a copy. O(K**3 d**3).
        """
        _check_int("components", components, 1)
        if not self.warm or self.components <= components:
            return self.copy()
        diag = self.covariance == "diag"
        pi, mu, cov = runnalls_reduce(self._pi, self._mu, self._cov, np.diag(self._floor),
                                      components, diag)
        out = self._like(components, max(self.warmup, components))
        for name in ("clock", "count", "W", "W2", "L", "LW", "E", "reseeds", "warm"):
            setattr(out, name, getattr(self, name))
        out._pi, out._mu, out._cov = pi / pi.sum(), mu, cov
        out._floor = self._floor.copy()
        out._recent = self._recent.copy()
        return out

    def _like(self, components: int, warmup: int) -> Mixture:
        """An empty Mixture with this one's settings and another component count."""
        return Mixture(components, self.dim, self.covariance, self.log, self.half_life,
                       warmup, self.seed, n_init=self.n_init, init_iter=self.init_iter,
                       min_weight=min(self.min_weight, 0.5 / components), reg=self.reg,
                       recent=self.recent)

    def copy(self) -> Mixture:
        return copy_state(self)

    # ---------------------------------------------------------------- read-outs
    @property
    def weight_sum(self) -> float:
        """Decayed sum of weights W (the pooling weight; 0.0 once below float64, though
        the state keeps its fit)."""
        return math.ldexp(self.W, max(-2200, min(2200, self.E)))

    @property
    def effective_samples(self) -> float:
        """Kish effective sample size W**2 / W2 (0 for an empty state)."""
        return self.W * self.W / self.W2 if self.W2 > 0.0 else 0.0

    @property
    def weights(self) -> np.ndarray:
        """Component weights (K,), summing to 1; NaN while warming."""
        return self._pi.copy() if self.warm else np.full(self.components, np.nan)

    @property
    def means(self) -> np.ndarray:
        """Component means (K, d) in the fitted space; NaN while warming."""
        return self._mu.copy() if self.warm else np.full((self.components, self.dim), np.nan)

    @property
    def covariances(self) -> np.ndarray:
        """Component covariances (K, d, d) in the fitted space, floor included (diagonal
        for "diag"); NaN while warming."""
        if not self.warm:
            return np.full((self.components, self.dim, self.dim), np.nan)
        return self._cov + np.diag(self._floor)

    @property
    def stddevs(self) -> np.ndarray:
        """Per-field standard deviation of each component (K, d), fitted space."""
        return np.sqrt(np.diagonal(self.covariances, axis1=1, axis2=2))

    @property
    def original_means(self) -> np.ndarray:
        """Per-field mean of each component (K, d) in the original units: with ``log``
        the log-normal mean exp(mu + sigma**2 / 2), else ``means``."""
        if not self.log:
            return self.means
        return np.exp(self.means + 0.5 * self.stddevs ** 2)

    @property
    def original_stddevs(self) -> np.ndarray:
        """Per-field standard deviation of each component (K, d) in the original units:
        with ``log`` the log-normal sqrt(exp(sigma**2) - 1) exp(mu + sigma**2 / 2)."""
        if not self.log:
            return self.stddevs
        s2 = self.stddevs ** 2
        return np.sqrt(np.expm1(s2)) * np.exp(self.means + 0.5 * s2)

    @property
    def average_loglik(self) -> float:
        """Decayed average log-likelihood per observation, in the fitted space.

        Each row is scored by the model as it stood before the row's step (the
        warm-up rows by the initial fit), so this measures how well the model
        predicts what arrives. NaN while warming.
        """
        return self.L / self.LW if self.warm and self.LW > 0.0 else math.nan

    def loglik(self, x: object) -> np.ndarray:
        """Log density of each row (n,) under the model, for outlier scoring.

        In the original space: with ``log`` the Jacobian -sum(log x) is
        included, and a row with a value <= 0 scores -inf. While warming, the
        single Gaussian of the buffer (NaN when it is empty). O(n K d**2).
        """
        b = check_batch(x, self.dim)
        y, bad, jac = self._to_fitted(b.x)
        if self.warm:
            ll = _logsumexp(_log_prob(y, self._prepared()))[0]
        else:
            single = self._single()
            if single is None:
                return np.full(b.x.shape[0], np.nan)
            mean, cov, floor = single
            ll = _log_prob(y, _prepare(np.ones(1), mean[None], cov[None], floor, "full"))[:, 0]
        return np.where(bad, -np.inf, ll - jac)

    def responsibilities(self, x: object) -> np.ndarray:
        """Posterior probability of each component for each row (n, K); rows sum to 1.

        NaN while warming, and for rows outside the domain of a log mixture.
        O(n K d**2).
        """
        b = check_batch(x, self.dim)
        y, bad, _ = self._to_fitted(b.x)
        if not self.warm:
            return np.full((b.x.shape[0], self.components), np.nan)
        gamma = _logsumexp(_log_prob(y, self._prepared()))[1]
        gamma[bad] = np.nan
        return gamma

    def cdf(self, v: object, field: int = 0) -> float | np.ndarray:
        """P(X_field <= v) under the model's marginal, in the original units.

        While warming, the single Gaussian (log-normal with ``log``) of the
        buffer; NaN when there is nothing yet. O(n K) erfc evaluations.
        """
        w, m, s = self._marginal(field)
        va = np.asarray(v, dtype=np.float64)
        if w is None:
            out = np.full(va.shape, np.nan)
        elif self.log:
            with np.errstate(divide="ignore", invalid="ignore"):
                lv = np.log(np.where(va > 0.0, va, 1.0))
            out = np.where(va > 0.0, normal_mixture_cdf(lv, w, m, s), 0.0)
        else:
            out = normal_mixture_cdf(va, w, m, s)
        return float(out) if out.ndim == 0 else out

    def quantile(self, q: float | object, field: int = 0) -> float | np.ndarray:
        """The q-quantile of field ``field`` in the original units, by monotone inversion
        of the mixture CDF (to float64 rounding in probability, far below 1e-9).

        ``q`` may be a number (returns a float) or a sequence (returns an array).
        While warming, the single Gaussian (log-normal with ``log``) of the buffer;
        NaN when there is nothing yet. O(K) per iteration, about 10 iterations.
        """
        qa = np.asarray(q, dtype=np.float64)
        if not ((qa > 0.0) & (qa < 1.0)).all():
            bad = qa.reshape(-1)[~((qa.reshape(-1) > 0.0) & (qa.reshape(-1) < 1.0))][0]
            raise IncompatibleError("q", float(bad), "must lie strictly between 0 and 1")
        w, m, s = self._marginal(field)
        if w is None:
            out = np.full(qa.shape, np.nan)
        else:
            out = np.array([normal_mixture_quantile(float(p), w, m, s)
                            for p in qa.reshape(-1)]).reshape(qa.shape)
            if self.log:
                out = np.exp(out)
        return float(out) if out.ndim == 0 else out

    # ---------------------------------------------------------------- internals
    def _prepared(self) -> tuple:
        if self._prep is None:
            self._prep = _prepare(self._pi, self._mu, self._cov, self._floor, self.covariance)
        return self._prep

    def _single(self) -> tuple[np.ndarray, np.ndarray, np.ndarray] | None:
        """(mean, raw covariance, floor) of the warm-up buffer, or None when empty."""
        if self._buf.shape[0] == 0 or not self._buf_w.sum() > 0.0:
            return None
        mean, cov = _weighted_gaussian(self._buf, self._buf_w)
        if self.covariance == "diag":
            cov = np.diag(np.diagonal(cov))
        return mean, cov, _floor_for(mean, np.diagonal(cov), self.reg)

    def _marginal(self, field: int) -> tuple:
        """(weights, means, sds) of one field's marginal in the fitted space."""
        if not (isinstance(field, (int, np.integer)) and 0 <= field < self.dim):
            raise ShapeError("field", field, f"must be an integer in [0, {self.dim})")
        if self.warm:
            return (self._pi, self._mu[:, field],
                    np.sqrt(self._cov[:, field, field] + self._floor[field]))
        single = self._single()
        if single is None:
            return None, None, None
        mean, cov, floor = single
        return np.ones(1), mean[field:field + 1], np.sqrt([cov[field, field] + floor[field]])

    def _to_fitted(self, x: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(fitted rows, rows outside the domain, log-Jacobian per row)."""
        n = x.shape[0]
        if not self.log:
            return x, np.zeros(n, bool), np.zeros(n)
        bad = (x <= 0.0).any(axis=1)
        y = np.log(np.where(bad[:, None], 1.0, x))
        return y, bad, y.sum(axis=1)

    # ------------------------------------------------------------- persistence
    def to_dict(self) -> dict:
        """Plain, versioned, msgpack-able form; ``from_dict(to_dict())`` is exact,
        warm-up buffer included, and continues identically."""
        return {
            "kind": self.kind, "version": self.version, "components": self.components,
            "dim": self.dim, "covariance": self.covariance, "log": self.log,
            "half_life": None if self.half_life is None else self.half_life.to_dict(),
            "warmup": self.warmup, "seed": self.seed, "n_init": self.n_init,
            "init_iter": self.init_iter, "min_weight": self.min_weight, "reg": self.reg,
            "recent": self.recent, "clock": self.clock, "count": self.count, "W": self.W,
            "W2": self.W2, "L": self.L, "LW": self.LW, "reseeds": self.reseeds,
            "warm": self.warm, "pi": self._pi.tolist(), "mu": self._mu.tolist(),
            "cov": self._cov.tolist(), "floor": self._floor.tolist(),
            "buffer": self._buf.tolist(), "buffer_weights": self._buf_w.tolist(),
            "recent_rows": self._recent.tolist(),
        } | ({"mu_lo": self._mu_lo.tolist()} if self._mu_lo.any() else {}) \
            | ({"since_check": self._since_check} if self._since_check else {}) \
            | ({"scale_exponent": self.E} if self.E else {}) \
            | ({"quiet_checks": self._quiet} if self._quiet else {})

    @classmethod
    def from_dict(cls, d: dict) -> Mixture:
        """Rebuild a state from ``to_dict``; raises IncompatibleError on a foreign form."""
        check_saved(d, cls.kind, cls.version)
        try:
            k, dim = int(d["components"]), int(d["dim"])
            m = cls(k, dim, d["covariance"], bool(d["log"]), HalfLife.from_dict(d["half_life"]),
                    int(d["warmup"]), int(d["seed"]), n_init=int(d["n_init"]),
                    init_iter=int(d["init_iter"]), min_weight=float(d["min_weight"]),
                    reg=float(d["reg"]), recent=int(d["recent"]))
            m.clock = None if d["clock"] is None else float(d["clock"])
            m.count, m.reseeds, m.warm = int(d["count"]), int(d["reseeds"]), bool(d["warm"])
            m.W, m.W2, m.L, m.LW = (float(d[key]) for key in ("W", "W2", "L", "LW"))
            m._pi = np.asarray(d["pi"], dtype=np.float64).reshape(k)
            m._mu = np.asarray(d["mu"], dtype=np.float64).reshape(k, dim)
            m._since_check = int(d.get("since_check", 0))
            m.E = saved_exponent(d)
            m._quiet = min(max(int(d.get("quiet_checks", 0)), 0), _MOVE_BACKOFF)
            if "mu_lo" in d:
                m._mu_lo = np.asarray(d["mu_lo"], dtype=np.float64).reshape(k, dim)
            m._cov = np.asarray(d["cov"], dtype=np.float64).reshape(k, dim, dim)
            m._floor = np.asarray(d["floor"], dtype=np.float64).reshape(dim)
            m._buf = np.asarray(d["buffer"], dtype=np.float64).reshape(-1, dim)
            m._buf_w = np.asarray(d["buffer_weights"], dtype=np.float64).reshape(-1)
            m._recent = np.asarray(d["recent_rows"], dtype=np.float64).reshape(-1, dim)
        except (KeyError, TypeError, ValueError) as exc:
            raise IncompatibleError("mixture", type(exc).__name__, f"malformed state: {exc}") \
                from None
        if m._buf.shape[0] != m._buf_w.shape[0]:
            raise IncompatibleError("buffer_weights", m._buf_w.shape[0],
                                    f"must hold one weight per buffered row ({m._buf.shape[0]})")
        return m

    def __repr__(self) -> str:
        state = "warm" if self.warm else f"warming {self._buf.shape[0]}/{self.warmup}"
        return (f"Mixture(components={self.components}, dim={self.dim}, {state}, "
                f"W={self.W:.6g}, reseeds={self.reseeds})")


# ---------------------------------------------------------------------- helpers
def check_positive(x: np.ndarray) -> None:
    """Raise DomainError naming the first value <= 0 (a log mixture needs x > 0). O(n d)."""
    ok = x > 0.0
    if not ok.all():
        row, col = np.argwhere(~ok)[0]
        raise DomainError("x", float(x[row, col]),
                          f"row {row}, column {col} must be > 0 for a log mixture")


def _check_int(name: str, value: object, least: int) -> None:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < least:
        raise IncompatibleError(name, value, f"must be an integer >= {least}")


def _floor_for(mean: np.ndarray, var: np.ndarray, reg: float) -> np.ndarray:
    """Covariance floor per field: reg times the field's variance, and never below the
    float resolution of the field's magnitude (so a constant field reads as its value).

    (2**-60 |mean|)**2 keeps mean + sd * Phi^-1(q) equal to the mean in float64 for
    every q down to 1e-15 (half an ulp of m is at least 2**-54 |m|). The floor is
    never below 1e-100, so that a squared difference of accepted values (at most
    (2e100)**2) over it stays finite: a constant 0 reads with sd 1e-50."""
    resolution = np.maximum((_RESOLUTION * mean) ** 2, _TINY_VARIANCE)
    return np.maximum(reg * np.where(var > 0.0, var, 0.0), resolution)


def _weighted_gaussian(y: np.ndarray, v: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Weighted mean (d,) and maximum-likelihood covariance (d, d), two centred passes
    on rows shifted by the first (exact for constant data, no digits lost to offsets)."""
    total = v.sum()
    yc = y - y[0]
    shift = (v @ yc) / total
    yc = yc - shift
    return y[0] + shift, (yc.T * v) @ yc / total


def _outer(delta: np.ndarray, diag: bool) -> np.ndarray:
    """Per-component delta delta^T (K, d, d); only its diagonal for diagonal models."""
    if diag:
        out = np.zeros(delta.shape + (delta.shape[1],))
        idx = np.arange(delta.shape[1])
        out[:, idx, idx] = delta * delta
        return out
    return delta[:, :, None] * delta[:, None, :]


def _prepare(pi: np.ndarray, mu: np.ndarray, cov: np.ndarray, floor: np.ndarray,
             covariance: str) -> tuple:
    """Constants of log(pi_k N(y; mu_k, cov_k + floor)) for fast batch evaluation."""
    k, d = mu.shape
    if (pi > 0.0).all():
        logpi = np.log(pi)
    else:
        with np.errstate(divide="ignore"):
            logpi = np.log(pi)
    if d == 1:
        var = cov[:, 0, 0] + floor[0]
        return ("one", logpi - 0.5 * (_LOG_2PI + np.log(var)), mu[:, 0], 1.0 / var)
    if covariance == "diag":
        var = np.diagonal(cov, axis1=1, axis2=2) + floor
        const = logpi - 0.5 * (d * _LOG_2PI + np.log(var).sum(axis=1))
        return ("diag", const, mu, 1.0 / np.sqrt(var))
    full = cov + np.diag(floor)
    try:
        chol = np.linalg.cholesky(full)
    except np.linalg.LinAlgError:   # rounding made a raw covariance indefinite: clip it
        vals, vecs = np.linalg.eigh(cov)
        full = (vecs * np.maximum(vals, 0.0)[:, None, :]) @ vecs.transpose(0, 2, 1) \
            + np.diag(floor)
        chol = np.linalg.cholesky(full)
    upper = np.linalg.inv(chol).transpose(0, 2, 1)     # Sigma^-1 = U U^T
    logdet = 2.0 * np.log(np.diagonal(chol, axis1=1, axis2=2)).sum(axis=1)
    stacked = upper.transpose(1, 0, 2).reshape(d, k * d)
    mu_u = np.einsum("kd,kde->ke", mu, upper)
    return ("full", logpi - 0.5 * (d * _LOG_2PI + logdet), stacked, mu_u)


def _log_prob(y: np.ndarray, prep: tuple) -> np.ndarray:
    """log(pi_k N(y_i; mu_k, Sigma_k)), (n, K). O(n K d**2)."""
    kind, const = prep[0], prep[1]
    if kind == "one":
        diff = y[:, :1] - prep[2]
        return const - 0.5 * (diff * diff) * prep[3]
    if kind == "diag":
        z = (y[:, None, :] - prep[2][None]) * prep[3][None]
        return const - 0.5 * (z * z).sum(axis=2)
    k = const.shape[0]
    z = (y @ prep[2]).reshape(y.shape[0], k, -1) - prep[3][None]
    return const - 0.5 * (z * z).sum(axis=2)


def _logsumexp(lp: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Row-wise log-sum-exp (n,) and the normalised responsibilities (n, K)."""
    top = lp.max(axis=1, keepdims=True)
    if np.isfinite(top).all():
        e = np.exp(lp - top)
        s = e.sum(axis=1)              # >= 1: the top term is exp(0)
        return np.log(s) + top[:, 0], e / s[:, None]
    top = np.where(np.isfinite(top), top, 0.0)    # a row no component can explain
    e = np.exp(lp - top)
    s = e.sum(axis=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.log(s) + top[:, 0], e / s[:, None]


def _e_step(y: np.ndarray, prep: tuple) -> tuple[np.ndarray, np.ndarray]:
    return _logsumexp(_log_prob(y, prep))


def _batch_stats(y: np.ndarray, r: np.ndarray, diag: bool, centre: np.ndarray,
                 lo: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per-component weight a (K,), mean less ``centre`` (+ ``lo``) (K, d) and centred
    scatter (K, d, d) of a batch under weights r (n, K); components with a = 0 get 0.

    The rows are shifted by the first one before any sum (Chan, Golub & LeVeque's
    shifted data) and the means are returned relative to each component's
    centre: rows equal to the centre add exactly nothing and large offsets cost
    no digits."""
    a = r.sum(axis=0)
    n, d = y.shape
    live = (a > 0.0)[:, None]
    ref = y[0]
    yc = y - ref
    # divide, never multiply by 1/a: a subnormal a would overflow its reciprocal
    s = np.divide(r.T @ yc, a[:, None], out=np.zeros((a.shape[0], d)), where=live)
    shift = s + (ref - centre)
    if lo is not None:
        shift -= lo
    shift[~live[:, 0]] = 0.0
    if d == 1:
        diff = yc - s[:, 0]                              # (n, K)
        return a, shift, (r * diff * diff).sum(axis=0).reshape(-1, 1, 1)
    diff = yc[:, None, :] - s[None]                      # (n, K, d)
    if diag:
        return a, shift, _outer_diag((r[:, :, None] * diff * diff).sum(axis=0))
    weighted = diff * r[:, :, None]
    scatter = np.matmul(weighted.transpose(1, 2, 0), diff.transpose(1, 0, 2))
    return a, shift, 0.5 * (scatter + scatter.transpose(0, 2, 1))


def _outer_diag(var: np.ndarray) -> np.ndarray:
    out = np.zeros(var.shape + (var.shape[1],))
    idx = np.arange(var.shape[1])
    out[:, idx, idx] = var
    return out


def _batch_m_step(y: np.ndarray, v: np.ndarray, gamma: np.ndarray, fallback_mu: np.ndarray,
                  data_cov: np.ndarray,
                  diag: bool) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Closed-form M-step on a whole buffer: (pi, mu, raw covariance, mu's low-order
    part). A component that got no weight keeps ``fallback_mu`` and the data
    covariance, with weight 0."""
    a, shift, cb = _batch_stats(y, v[:, None] * gamma, diag, fallback_mu)
    mb = fallback_mu + shift
    live = a > 0.0
    scaled = np.divide(cb, a[:, None, None], out=np.zeros_like(cb),
                       where=live[:, None, None])
    cov = np.where(live[:, None, None], scaled,
                   np.diag(np.diagonal(data_cov)) if diag else data_cov)
    mu = np.where(live[:, None], mb, fallback_mu)
    lo = np.where(live[:, None], shift - (mb - fallback_mu), 0.0)   # Fast2Sum's remainder
    return a / a.sum(), mu, cov, lo


def _kmeans_pp(y: np.ndarray, v: np.ndarray, k: int, rng: np.random.Generator) -> np.ndarray:
    """k-means++ seeding on weighted rows: each next centre drawn with probability
    proportional to weight times squared distance to the nearest chosen one. O(n k d)."""
    n = y.shape[0]
    p = v / v.sum()
    centres = [y[rng.choice(n, p=p)]]
    d2 = ((y - centres[0]) ** 2).sum(axis=1)
    for _ in range(1, k):
        mass = v * d2
        total = mass.sum()
        i = rng.choice(n, p=mass / total) if total > 0.0 else rng.choice(n, p=p)
        centres.append(y[i])
        d2 = np.minimum(d2, ((y - y[i]) ** 2).sum(axis=1))
    return np.array(centres)
