"""The mixed-model statistic kernel: observed maps and their resampled copies.

One contrast ``L`` (one row: t; k rows: F) of a :class:`~.fit.MixedFit`
behind the contract of :mod:`..ols`.  The observed statistic is the z of
equal p (see :mod:`.inference`) of the contrast scored at the null
model's variance components (below); the full fit's t or F and its
per-feature Satterthwaite df come along in ``Observed.test_statistic`` and
``df_map``.

Resampling (two levels, Winkler et al. 2015, NeuroImage 123:253-268)
--------------------------------------------------------------------
Participants are the units that move, never single maps:

* **within-participant effects** (a ``within`` contrast alone, a slope of a
  map covariate, raw weights that touch map-level columns): whole-participant
  sign flips -- each participant's residual vector is multiplied by +1 or -1
  (independent and symmetric errors at the participant level, which holds
  for any random-effect structure and any number of maps);
* **between-participant effects** (``compare``, a ``slope`` of a participants
  column, with or without ``within``): whole-participant permutations among
  participants whose maps have the same covariance layout (the same multiset of
  random-effect rows) and the same ``blocks`` label -- exchangeable because their
  residual vectors have the same covariance; counted and decided in
  :mod:`.exchange` (relabellings of the tested columns).  When the layouts leave
  fewer distinct relabellings than ``min(resamples, 1000, 2^N)``, whole-participant
  sign flips are used instead (``scheme_name`` says so, and the methods text).

Nuisance terms by Freedman-Lane (Freedman & Lane 1983; Winkler et al. 2014)
in the model's own metric: ``r_z = y - X beta_z`` with ``beta_z`` the GLS fit
of the model restricted to ``L beta = 0``, rearranged data ``X beta_z + P
r_z``.

Leverage-adjusted sign flips.  With few participants the restricted
residuals are shrunk by the nuisance fit: participant i's whitened residual
has covariance ``I - H0_ii`` (``H0`` the whitened hat matrix of the
restricted model), not ``I``.  Flipping them shrinks the numerator's
resampling variance; a GLM's refitted residual sum of squares cancels most
of that, but the mixed model's residual variance pools every map, most of
which the flips do not move, so plain flips are liberal (about 5.8% of
points with permutation p <= 0.05 on the unbalanced null cohorts of
``tests/test_mixed_calibration.py``).  Sign flips therefore move
``r*_i = Vbar_i^(1/2) (I - H0_ii)^(-1/2) Vbar_i^(-1/2) r_z,i``, the remedy of
the restricted wild bootstrap for the same shrinkage (the HC2 / CR2
residual; Davidson & Flachaire 2008, J Econometrics 146:162-169; MacKinnon,
Nielsen & Webb 2023, J Appl Econometrics 38:671-694; both cited from
memory), while the observed statistic is computed from the data as they are
and stands in for the identity flip.  ``H0_ii`` lives in the span of
participant i's design, so this costs a few r x r products per participant
and feature (r the number of distinct rows of a participant's design), once,
in :meth:`MixedKernel.prepare` (:func:`.leverage.leverage_adjust`);
the resampling loop is unchanged.  Whole-participant permutations move the
residuals as they are: for a between-participant effect the nuisance terms
live in the same (participant) stratum as the effect, and the re-estimated
residual variance compensates as in a GLM -- adjusting them made the test
conservative (family-wise error about 2% at alpha 0.05 on the same cohorts).

What is re-estimated per resample, and what is held fixed.  Held fixed per
feature: the variance components ``psi0`` of the *null model* (the model
restricted to ``L beta = 0``, fitted by REML once at every feature, see
:meth:`MixedKernel.null_fit`), so the GLS weighting ``Vbar^{-1}``, and the
Satterthwaite df computed at that fit (they depend on ``psi0`` and the
design only).  Re-estimated per resample -- and for the observed data, which
are scored the same way: the fixed effects by GLS, the residual variance
``sigma^2`` of the full model at ``psi0``, and so the t or F and its z.  Why
the test stays valid: the rearrangements leave the null distribution of the
Freedman-Lane data unchanged, and ``psi0`` is estimated from the
restricted model, in which the tested effect plays no part, so it describes
the observed data and every rearrangement alike (to the approximation
Freedman-Lane itself makes); a fixed weighting only decides which linear
combination of each participant's maps carries the effect (an efficiency
choice).  The full model's own estimates would not do: they are chosen with the
tested effect in view, and where they happen to make the observed t large the
rearrangements do not share it -- the maximum statistic then exceeds its
rearrangement distribution far more often than alpha (seen in the null
calibration).  The null calibration on unbalanced noise cohorts
(``tests/test_mixed_calibration.py``) checks the family-wise error.
Studentizing by the re-estimated ``sigma^2`` keeps features with different
noise on one scale for the map-wide maximum.  Identity resample = the
observed statistic (computed, or set to it with leverage-adjusted flips).  Estimates, standard errors, t, df and uncorrected p of
the maps come from the full model's REML fit (:func:`.contrast_statistics`);
the z that forms clusters and maxima is the scored one.

Cost.  With ``psi`` fixed, block-diagonal whitening commutes with
whole-participant sign flips and permutations, so per feature the data
reduce once to ``v_i = L_A^{-1} X_i' Vbar_i^{-1} r_z,i`` (``r*_i`` for sign
flips; p numbers per
participant; ``L_A`` the Cholesky factor of ``A``).  Then for sign flips
``s``: ``g = sum_i s_i v_i`` -- one product ``(R, N) @ (N, p F)`` for a block
of ``R`` resamples -- and ``t = a'g / sqrt((||r_z||^2_V - ||g||^2) / m)``
(``||r*||^2_V`` for adjusted flips), ``a = L_A^{-1} L' / ||.||``.
Permutations use the layout ``X_i = [b_i (x)
W_i, M_i]``: ``g = L_A^{-1} (sum_m (e_m (x) sum_j b_{pi^{-1} j, m} w_j),
sum_j w^M_j)`` with ``w_j = [W_j, M_j]' Vbar_j^{-1} r_z,j``, again one product
per between column.  No refit per resample.  Products have one fixed shape
(``kernels.RES_BLOCK`` resamples by ``kernels.FEATURE_CHUNK`` features) and
BLAS runs on one thread, so a resample's bits never depend on its batch.
"""

from __future__ import annotations


import numpy as np
from scipy import sparse, special

from . import linalg as la
from ..base import FEATURE_CHUNK, RES_BLOCK, FitInfo, Observed, StatisticKernel
from ...engine.blas import one_blas_thread
from ...engine.perthread import PerThread
from .model import MixedCore, MixedDesign
from .fit import MixedFit, fit_features
from .inference import (contrast_statistics, score_statistics, scored_z, t_switch, z_fast,
                        z_of_f)
from . import exchange
from .leverage import ParticipantSpans, leverage_adjust
from .moves import MapMoves, homogeneous
from . import robust
from ...resampling import Rearrangements, permutations, sign_flips


def _null_basis(Lmat):
    """Orthonormal basis (p, p - k) of {b : L b = 0}."""
    _, sv, Vt = np.linalg.svd(Lmat)
    rank = int(np.sum(sv > 1e-10 * sv[0]))
    return Vt[rank:].T


class MixedKernel(StatisticKernel):
    """Contrast ``contrast`` ((p,) -> t, (k, p) -> F) of a fitted mixed model.

    Parameters
    ----------
    fit : MixedFit over the features of ``Y``.
    Y : (n_maps, n_features) float32 data the model was fitted on.
    contrast : weights over the design's columns.
    scheme : "sign-flip" (within-participant effect) or "permutation"
        (between-participant effect); see the module docstring.
    variance_groups : None, or ``{"column": name, "labels": (N,) labels}``: the CR2
        cluster-robust statistic with whole-participant sign flips (:mod:`.robust`).
    """

    #: flip leverage-adjusted restricted residuals (module docstring); False only to
    #: study the plain scheme
    adjust_leverage = True

    def __init__(self, fit: MixedFit, Y, contrast, *, scheme="sign-flip", variance_groups=None):
        self.fit, self.Y = fit, Y
        self.vg = variance_groups
        self.robust = variance_groups is not None
        self.core = fit.core
        self.L = np.atleast_2d(np.asarray(contrast, float))
        self.kind = "t" if self.L.shape[0] == 1 else "F"
        self.requested = scheme
        self.mode = scheme
        self.n_features = int(Y.shape[1])
        self.n_units = self.core.N
        self.freedman_lane = self.core.p > self.L.shape[0]
        self._nu = None
        self._fit0 = None
        self.rearr = None
        self.df = (float("nan"),) if self.kind == "t" else (self.L.shape[0], float("nan"))
        self._buffers = PerThread()

    # -- observed -------------------------------------------------------------
    def null_fit(self) -> MixedFit:
        """The model restricted to L b = 0, fitted at every feature (once): its variance
        components weight the scored statistic and the rearrangements."""
        if self._fit0 is None:
            Nz = _null_basis(self.L)         # no columns: a model without fixed effects
            d = self.core.design
            core0 = MixedCore(MixedDesign(np.asarray(d.X) @ Nz, d.Z, d.groups))
            self._fit0 = fit_features(core0, self.Y, reml=self.fit.reml)
        return self._fit0

    def observed(self, tails):
        """Statistic: the scored z (null-model variance components, see the module
        docstring); estimate, SE, t or F (``test_statistic``), its Satterthwaite df
        (``df_map``) and p: the full REML fit."""
        cs = contrast_statistics(self.fit, self.Y, self.L, tails)
        if self.robust:
            cs, z0, nu0 = self._robust_observed(cs, tails)
        else:
            z0, _, nu0 = score_statistics(self.fit, self.null_fit(), self.Y, self.L)
        # degenerate features (fit code 3): an undefined statistic, counted by
        # stats.inference like the GLM's; every resample scores them 0
        z0 = np.where(self.fit.code == 3, np.nan, z0)
        self._nu = nu0
        self._z0 = np.asarray(z0, np.float32)
        med = round(float(np.median(cs.df[np.isfinite(cs.df)])), 3) \
            if np.isfinite(cs.df).any() else 0.0
        self.df = (med,) if self.kind == "t" else (cs.k, med)
        return Observed(self.kind, self.df, z0, cs.estimate, cs.se, cs.std_effect, cs.p,
                        scale="z", test_statistic=cs.statistic, df_map=cs.df)

    def _robust_design(self):
        if getattr(self, "_rd", None) is None:
            self._rd = robust.Design(self.core, np.asarray(self.vg["labels"]).astype(str))
        return self._rd

    def _robust_observed(self, cs, tails):
        """With variance groups: estimate, CR2 standard error, t or F and Bell-McCaffrey df
        of the full model's fit (written maps, parametric p), and the score z of the CR2
        statistic at the null model's variance components (clusters and maxima)."""
        rd, k = self._robust_design(), self.L.shape[0]
        est, se, stat, nu, live = robust.robust_statistics(rd, self.fit.theta, self.Y, self.L,
                                                           self.fit.reml)
        bad = (self.fit.code == 3) | ~live
        stat[bad], nu[bad] = 0.0, 1.0
        if k == 1:
            p = (np.minimum(1.0, 2.0 * special.stdtr(nu, -np.abs(stat))) if tails == "two"
                 else special.stdtr(nu, -stat) if tails == "greater" else special.stdtr(nu, stat))
            cs.se, cs.statistic = se, stat
        else:
            p = special.fdtrc(k, nu, np.maximum(stat, 0.0))
            cs.statistic = stat
            cs.std_effect = stat * k / (stat * k + nu)
        p[bad] = 1.0
        p[(self.fit.code == 3) | (self.fit.code == 2)] = np.nan     # as contrast_statistics
        cs.p, cs.df = p, nu
        cs.z = scored_z(stat, nu, t_switch(nu)) if k == 1 else z_of_f(stat, k, nu)
        fit0 = self.null_fit()
        _, _, stat0, nu0, live0 = robust.robust_statistics(rd, fit0.theta, self.Y, self.L,
                                                           self.fit.reml)
        bad0 = (self.fit.code == 3) | (fit0.code == 3) | ~live0
        stat0[bad0], nu0[bad0] = 0.0, 1.0
        z0 = z_fast(stat0, nu0) if k == 1 else z_of_f(stat0, k, nu0)
        z0[bad0] = 0.0
        return cs, z0, nu0

    def threshold(self, forming_p, tails):
        """The cluster-forming threshold on the z scale (the same for every feature)."""
        if self.kind == "t" and tails == "two":
            return float(-special.ndtri(forming_p / 2.0))
        return float(-special.ndtri(forming_p))

    def info(self):
        p = self.core.p
        method = "linear mixed model (" + ("REML" if self.fit.reml else "ML") + ")"
        return FitInfo(method, float(self.df[-1]), int(p), int(p - self.L.shape[0]))

    def describe(self) -> dict:
        """What the run record says about this contrast's statistic and resampling (the
        methods text is written from it)."""
        fit, fit0 = self.fit, self.null_fit()
        flips = self.mode == "sign-flip"
        adjusted = flips and self.freedman_lane and self.adjust_leverage
        plan = getattr(self, "_plan", None)
        vg = None
        if self.robust:
            labels, counts = np.unique(np.asarray(self.vg["labels"]).astype(str),
                                       return_counts=True)
            vg = {"column": self.vg.get("column"),
                  "sizes": {str(a): int(b) for a, b in zip(labels, counts)},
                  "reason": self.vg.get("reason", ""),
                  "method": "cr2"}
        return {
            "statistic": "z",
            "z_map": ("score z: the CR2 cluster-robust t or F of the full model at the "
                      "variance components of the model without the tested effect, through "
                      "Bell-McCaffrey df" if self.robust else
                      "score z: the t or F of the full model with the variance components "
                      "of the model without the tested effect, through Satterthwaite df of "
                      "that fit") + "; the full model's own z is written beside it",
            "df_rule": ("bell_mccaffrey" if self.robust else "satterthwaite_unconstrained"),
            "variance_groups": vg,
            "boundary_features": int(np.sum(fit.code == 1)),
            "boundary_features_null_model": int(np.sum(fit0.code == 1)),
            "not_converged_features": int(np.sum(fit.code == 2)),
            "random_effects": list(self.core.design.z_names) or None,
            "rearrangement": "whole-participant " + ("sign flips" if flips else
                                                     "permutations within covariance layouts"),
            "rearrangement_exact": not (adjusted or self.robust or self.freedman_lane),
            "rearrangement_note": (
                "sign flips of the full model's CR2-adjusted residuals on the fitted values "
                "of the model without the tested effect, each rearrangement studentized "
                "through its own df: an approximate test (a wild bootstrap), not an exact one"
                if self.robust else
                "leverage-adjusted sign flips of the restricted residuals: an approximate "
                "test in the manner of a restricted wild bootstrap, not an exact one"
                if adjusted else "Freedman-Lane: approximate, exact without nuisance terms"
                if self.freedman_lane else "exact"),
            "fallback": plan.fallback if plan is not None else "",
            "distinct_rearrangements": plan.distinct if plan is not None else None,
        }

    @property
    def scheme_name(self):
        names = {"sign-flip": "whole-participant sign flips",
                 "permutation": "whole-participant permutations within covariance layouts"}
        text = names[self.mode]
        if self.robust:
            return text + " of CR2-adjusted residuals (variance groups)"
        if self.mode != self.requested:
            text += " (too few participants share a covariance layout to permute)"
        if self.freedman_lane and self.adjust_leverage and self.mode == "sign-flip":
            return text + " / Freedman-Lane, leverage-adjusted residuals"
        return text + (" / Freedman-Lane" if self.freedman_lane else "")

    # -- rearrangements -------------------------------------------------------
    def rearrangement_plan(self, n_resamples, blocks=None) -> exchange.Plan:
        """What :meth:`rearrangements` will draw, decided from the design alone."""
        return exchange.plan(self.core.design, self.L, self.requested, n_resamples, blocks,
                             variance_groups=self.robust)

    def rearrangements(self, n_resamples, seed, blocks=None) -> Rearrangements:
        N = self.core.N
        plan = self.rearrangement_plan(n_resamples, blocks)
        self._plan = plan
        self.mode = plan.scheme
        if plan.scheme == "permutation":
            d = self.core.design
            labels = exchange.tested_labels(d.between, self.L, np.asarray(d.within).shape[1])
            layout = d.layout if d.layout is not None else np.zeros(N, int)
            self._exchange_blocks = exchange.blocks_of(layout, blocks)
            return permutations(N, int(n_resamples), seed, labels=labels,
                                blocks=self._exchange_blocks)
        return sign_flips(N, int(n_resamples), seed)

    # -- preparation ----------------------------------------------------------
    def prepare(self, rearr: Rearrangements):
        self.rearr = rearr
        if self._nu is None:
            self.observed("two")
        core, F = self.core, self.n_features
        self.fc = min(FEATURE_CHUNK, F)
        nch = -(-F // self.fc)
        k, p, N = self.L.shape[0], core.p, core.N
        perm = rearr.kind == "permutation"
        self.adjusted = bool(self.adjust_leverage and not perm and self.freedman_lane)
        # with adjusted flips (and with variance groups, which flip full-model residuals)
        # the identity row is the observed statistic itself
        self._identity = (np.flatnonzero((rearr.matrix == 1).all(axis=1))
                          if self.adjusted or self.robust else np.zeros(0, int))
        self.live = np.zeros(nch * self.fc, bool)
        self.moves = None
        if perm:
            d = core.design
            self.pb, self.pw = d.between.shape[1], d.within.shape[1]
            self.pm = 0 if d.map_cols is None else d.map_cols.shape[1]
            blocks = getattr(self, "_exchange_blocks", None)
            if blocks is None or not homogeneous(d, blocks):
                self.moves = MapMoves(core)
            rows, width = (N, self.pw) if self.moves is None else (self.moves.width, 1)
        else:
            rows, width = N, (self._robust_design().G * p + k * p * k if self.robust else p)
        self.width = width
        self.data = np.zeros((nch, rows, width * self.fc), np.float32)
        self.flip_parts = []
        self.a = np.zeros((k, p, nch * self.fc), np.float32)
        self.rr = np.zeros(nch * self.fc, np.float32)
        self.nu = np.ones(nch * self.fc)
        self.nu[:F] = np.where(np.isfinite(self._nu) & (self._nu > 0), self._nu, 1.0)
        self.switch = t_switch(self.nu)
        if perm:
            self.LA = np.zeros((p, p, nch * self.fc), np.float32)
            self.hm = np.zeros((self.pm, nch * self.fc), np.float32)
        self._design_parts(perm)
        with one_blas_thread():
            for c in range(nch):
                a, b = c * self.fc, min(F, (c + 1) * self.fc)
                self._prepare_chunk(c, a, b, perm)

    def _design_parts(self, perm):
        """Per-participant design products the preparation needs (once)."""
        core = self.core
        X, g, N, p, n = core.X, core.groups, core.N, core.p, core.n
        rows = (g[:, None] * p + np.arange(p)[None, :]).ravel()
        cols = np.repeat(np.arange(n), p)
        self.Sx = sparse.csr_matrix((X.ravel(), (rows, cols)), shape=(N * p, n))
        self.XX = np.zeros((N, p, p))
        np.add.at(self.XX, g, X[:, :, None] * X[:, None, :])
        self.spans = ParticipantSpans(core) if self.adjusted else None
        if perm:
            d = core.design
            Lw = np.hstack([d.within] + ([d.map_cols] if self.pm else []))
            pl = Lw.shape[1]
            rows = (g[:, None] * pl + np.arange(pl)[None, :]).ravel()
            self.SL = sparse.csr_matrix((Lw.ravel(), (rows, np.repeat(np.arange(n), pl))),
                                        shape=(N * pl, n))
            self.LX = np.zeros((N, pl, p))
            np.add.at(self.LX, g, Lw[:, :, None] * X[:, None, :])
            self.HL = np.stack([np.stack([core.onehot @ (core.Z[:, a] * Lw[:, j])
                                          for j in range(pl)], axis=1) for a in range(core.q)])
            self.pl = pl

    def _prepare_chunk(self, c, a, b, perm):
        core, L = self.core, self.L
        p, q, N, f = core.p, core.q, core.N, b - a
        Yc = np.asarray(self.Y[:, a:b], np.float64)
        st = core.stats(Yc)
        fit0 = self.null_fit()
        ev = core.evaluate(fit0.theta[:, a:b], st, self.fit.reml, order=0)
        live = ev.ok & (self.fit.code[a:b] != 3) & (fit0.code[a:b] != 3) \
            & np.isfinite(self.nu[a:b]) & (self.nu[a:b] > 0)
        LA = np.where(live, ev.LA, np.eye(p)[:, :, None])
        A = la.mm(LA, la.T(LA))
        # Freedman-Lane: GLS fit of the model restricted to L b = 0
        Nz = _null_basis(L)
        if Nz.shape[1]:
            Az = np.einsum("pi,pqf,qj->ijf", Nz, A, Nz)
            Lz, _ = la.chol(Az)
            beta_z = Nz @ la.chol_solve(Lz, Nz.T @ ev.b)
        else:
            beta_z = np.zeros((p, f))
        Ki = ev.Kc[:, :, core.cls]                                       # (q, q, N, f)
        Hbz = (core.Hmat.T @ beta_z).reshape(q, N, f)
        w = la.mv(Ki, st.u - Hbz)                                        # K_i Z_i' r_z,i
        Xy = np.asarray(self.Sx @ Yc).reshape(N, p, f).transpose(1, 0, 2)
        XXb = (self.XX.reshape(N * p, p) @ beta_z).reshape(N, p, f).transpose(1, 0, 2)
        h = Xy - XXb - np.einsum("aik,aif->kif", core.H, w)              # X_i' Vbar_i^-1 r_z,i
        g1 = la.solve_lower(LA[:, :, None, :], h).sum(axis=1)
        rr = np.where(live, np.maximum(ev.r2, 0.0), 1.0) + (g1 * g1).sum(axis=0)
        if self.adjusted:
            h, extra = leverage_adjust(h, Nz, Lz, self.spans, Ki)
            rr = rr + np.where(live, extra, 0.0)
        v = la.solve_lower(LA[:, :, None, :], h)                          # (p, N, f)
        # effect directions in the whitened coordinates
        At = la.solve_lower(LA[:, :, None, :], np.broadcast_to(L.T[:, :, None], (p, L.shape[0], f)))
        At = la.orthonormal_columns(At)                                     # (p, k, f)
        At = np.where(live, At, 0.0)
        fc = self.fc
        self.live[a:b] = live
        self.a[:, :, a:a + f] = np.transpose(At, (1, 0, 2))
        self.rr[a:a + f] = rr
        if self.robust:                      # v and the CR2 parts (robust.flip_data)
            out = robust.robust_block(self._robust_design(), fit0.theta[:, a:b], Yc, L,
                                      self.fit.reml)
            v, fp = robust.flip_data(self._robust_design(), out, L.shape[0])
            live = live & out["live"]
            self.live[a:b] = live
            self.flip_parts.append(fp)
            self.a[:, :, a:a + f] = np.where(live, np.transpose(out["a"], (1, 0, 2)), 0.0)
        if not perm:
            v = np.where(live, v, 0.0)
            blk = np.zeros((N, self.width, fc), np.float32)
            blk[:, :, :f] = v.transpose(1, 0, 2)
            self.data[c] = blk.reshape(N, self.width * fc)
            return
        self.LA[:, :, a:a + f] = LA
        if self.moves is not None:                   # map rows: r_z and K_i Z_i' r_z,i
            blk = np.zeros((self.moves.width, fc), np.float32)
            blk[:core.n, :f] = np.where(live, Yc - core.X @ beta_z, 0.0)
            blk[core.n:, :f] = np.where(live, w, 0.0).reshape(q * N, f)
            self.data[c] = blk
            return
        Lwy = np.asarray(self.SL @ Yc).reshape(N, self.pl, f).transpose(1, 0, 2)
        LXb = (self.LX.reshape(N * self.pl, p) @ beta_z).reshape(N, self.pl, f).transpose(1, 0, 2)
        ell = Lwy - LXb - np.einsum("aik,aif->kif", self.HL, w)          # (pl, N, f)
        ell = np.where(live, ell, 0.0)
        blk = np.zeros((N, self.pw, fc), np.float32)
        blk[:, :, :f] = ell[:self.pw].transpose(1, 0, 2)
        self.data[c] = blk.reshape(N, self.pw * fc)
        self.hm[:, a:a + f] = ell[self.pw:].sum(axis=1)

    # -- resampling -----------------------------------------------------------
    def _block_rows(self, k):
        """The product matrix of resample block ``k`` (zero rows for absent resamples)."""
        N = self.core.N
        m = self.rearr.n_resamples
        lo, hi = k * RES_BLOCK, min(m, (k + 1) * RES_BLOCK)
        rows = self.rearr.matrix[lo:hi]
        if self.rearr.kind == "sign-flip":
            G = np.zeros((RES_BLOCK, N), np.float32)
            G[:hi - lo] = rows
            return G
        if self.moves is not None:
            return self.moves.rows(rows, RES_BLOCK)
        B = self.core.design.between.astype(np.float32)
        inv = np.argsort(rows, axis=1)                                  # slot j -> data of j
        G = np.zeros((RES_BLOCK, self.pb, N), np.float32)
        G[:hi - lo] = np.transpose(B[inv], (0, 2, 1))
        return G.reshape(RES_BLOCK * self.pb, N)

    def _g(self, prod, rows, a, b):
        """Whitened effect-space coordinates g (p, R, f) of the product of a block."""
        R, f, fc = rows.stop - rows.start, b - a, self.fc
        p = self.core.p
        if self.rearr.kind == "sign-flip":
            P = prod.reshape(RES_BLOCK, self.width, fc)[rows, :, :f]
            if self.robust:                  # gg and T of robust.flip_statistic, float64
                k, G = self.L.shape[0], self._robust_design().G
                T = P[:, G * p:].reshape(R, k, p, k, f).transpose(1, 2, 3, 0, 4)
                gg = P[:, :G * p].reshape(R, G, p, f).transpose(1, 2, 0, 3)
                return gg.astype(np.float64), T.astype(np.float64)
            return np.transpose(P, (1, 0, 2))
        if self.moves is not None:
            P = prod.reshape(RES_BLOCK, p, fc)[rows, :, :f]
            return la.solve_lower(self.LA[:, :, None, a:b],
                                  np.transpose(P, (1, 0, 2))).astype(np.float32)
        P = prod.reshape(RES_BLOCK, self.pb, self.pw, fc)[rows, :, :, :f]
        h = np.empty((p, R, f), np.float32)
        h[:self.pb * self.pw] = np.transpose(P.reshape(R, self.pb * self.pw, f), (1, 0, 2))
        if self.pm:
            h[self.pb * self.pw:] = self.hm[:, None, a:b]
        return la.solve_lower(self.LA[:, :, None, a:b], h).astype(np.float32)

    def _statistic(self, g, a, b):
        """z (R, f) from g (p, R, f): t or F at the fixed variance components, then z
        (with variance groups ``g`` is the pair (g, T) of :func:`.robust.flip_statistic`)."""
        if self.robust:                      # each resample's own CR2 statistic and df
            gg, T = g
            fp = self.flip_parts[a // self.fc]
            st, nu = robust.flip_statistic(gg, T, np.transpose(self.a[:, :, a:b], (1, 0, 2))
                                           .astype(np.float64), fp)
            live = self.live[a:b]
            st, nu = np.where(live, st, 0.0), np.where(live, nu, 1.0)
            if self.kind == "t":
                return z_fast(st, nu).astype(np.float32)
            return z_of_f(st, self.L.shape[0], nu).astype(np.float32)
        m = np.float32(self.core.m(self.fit.reml))
        ss = (g * g).sum(axis=0)
        rss = np.maximum(self.rr[None, a:b] - ss, np.float32(1e-30))
        U = [(self.a[j, :, None, a:b] * g).sum(axis=0) for j in range(self.L.shape[0])]
        nu = self.nu[a:b]
        if self.kind == "t":
            t = U[0] * np.sqrt(m / rss)
            return scored_z(t.astype(np.float64), nu, self.switch[a:b]).astype(np.float32)
        k = len(U)
        Fv = sum(u * u for u in U) * (m / rss) / np.float32(k)
        return z_of_f(Fv.astype(np.float64), k, nu).astype(np.float32)

    def resampled(self, lo, hi, out=None, part=None):
        """z maps of resamples lo..hi-1 (see the contract in :mod:`..ols`)."""
        B = hi - lo
        F, fc = self.n_features, self.fc
        ks = range(lo // RES_BLOCK, (hi - 1) // RES_BLOCK + 1)
        mx = np.full(B, -np.inf)
        mn = np.full(B, np.inf)
        with one_blas_thread():
            Gs = [self._block_rows(k) for k in ks]
            for c in self.chunk_range(self.data.shape[0], part):
                a, b = c * fc, min(F, (c + 1) * fc)
                D = self.data[c]
                for k, G in zip(ks, Gs):
                    i0, i1 = max(lo, k * RES_BLOCK), min(hi, (k + 1) * RES_BLOCK)
                    prod = G @ D
                    g = self._g(prod, slice(i0 - k * RES_BLOCK, i1 - k * RES_BLOCK), a, b)
                    z = self._statistic(g, a, b)
                    for i in self._identity[(self._identity >= i0) & (self._identity < i1)]:
                        z[i - i0] = np.where(self.live[a:b], self._z0[a:b], z[i - i0])
                    if out is not None:
                        out[i0 - lo:i1 - lo, a:b] = z
                    else:
                        seg = slice(i0 - lo, i1 - lo)
                        np.maximum(mx[seg], z.max(axis=1), out=mx[seg])
                        np.minimum(mn[seg], z.min(axis=1), out=mn[seg])
        return out, mx, mn
