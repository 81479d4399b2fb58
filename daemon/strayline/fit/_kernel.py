"""Compiled batched Levenberg–Marquardt kernel for ODMR spectra (numba).

One call fits a whole batch of spectra on a shared frequency grid. Each spectrum runs
its own damped Gauss–Newton iteration inside a ``prange`` loop and leaves as soon as it
has converged, so the batch costs the sum of the spectra's own iterations, not the
slowest spectrum's count times the batch size.

Model (in the scaled frequency ``x``; see :mod:`strayline.fit` for the Hz form)::

    mu(x) = (b + s x) * (1 - sum_i C_i sum_m w_m L(x; c_i + o_m, G_i))
    L(x; c, G) = (G/2)^2 / ((x - c)^2 + (G/2)^2)          (unit-height Lorentzian)

Parameter layout of a row of ``p`` (``nd`` dips, ``nw`` widths, 1 or ``nd``)::

    [c_0 .. c_{nd-1}, C_0 .. C_{nd-1}, G_0 .. G_{nw-1}, b, (s)]

Objective. ``poisson=1``: the Poisson likelihood-ratio χ² of Baker & Cousins [1]_,
``2 Σ [mu - y + y ln(y / mu)]`` per sample, continued below ``mu = 1`` by its second-order
expansion with unit curvature, so that the Fisher-scoring weights are exactly
``1 / max(mu, 1)`` and the objective stays finite for ``mu <= 0``. ``poisson=0``: plain
least squares ``Σ (y - mu)^2``.

Iteration. Gauss–Newton normal equations ``A = J^T W J``, ``g = J^T W (y - mu)`` with
Marquardt's damping scaled by the diagonal, ``(A + λ D) δ = g`` ([2]_; ``D`` = running
maximum of ``diag(A)``, Moré's variant [3]_). A step is accepted by the gain ratio
``ρ = (F(p) - F(p + δ)) / (2 δ·g - δ·A·δ)`` and λ is updated by Nielsen's rule
``λ ← λ max(1/3, 1 - (2ρ - 1)^3)``; a rejected step multiplies λ by ν = 2, 4, 8, ...
([4]_, Sec. 3.2 and Algorithm 3.16; section and algorithm numbers from memory).
Box bounds are honoured by projection: a parameter on a bound whose gradient points
outward is held for that step, and the trial point is clipped to the box; the predicted
decrease is evaluated for the clipped step. The fused pass is also "one loop" only in
spirit: it runs a few unit-stride loops over the grid so that the compiler vectorises
them.

Width prior. Optionally a Gaussian prior on every width adds ``w_ivar (G - w0)²`` to the
objective (:mod:`strayline.fit` sets it from the line's pooled width); ``w_ivar = 0`` is
the plain likelihood.

Uncertainties. 1σ = √diag(H⁻¹) with H the *observed* information, the Hessian of the
objective at the solution, which Efron & Hinkley [5]_ show to be the better conditional
variance estimate; at low counts it differs from the expected information ``A`` by a
few per cent to tens of per cent (24 % in one test spectrum), and on simulated demo
spectra (600 counts per point) it cut the share of centres beyond 3σ from 1.5 % to
1.1 %. Its model second derivatives are analytic (:func:`_observed_info`). Where H is not
positive definite (a fit stopped off a minimum) ``A`` is used.

Each pass over the grid is fused: the model, the objective, ``A`` and ``g`` are
accumulated together, so an accepted trial point already carries its normal
equations and one iteration costs about one model+Jacobian pass. The Poisson objective's
logarithms come from a short series about the baseline (:func:`_ln_near1`), so that
the pass vectorises (the library logarithm, a call per sample, cost a third of it);
σ takes one Cholesky factorisation and the diagonal of its inverse.

Convergence: the Newton decrement ``g·A⁻¹g`` (restricted to the free parameters) is the
χ² decrease a full Gauss–Newton step would still give; the fit stops when it is below
``xtol² s²`` (``s² = 1`` for Poisson weights, the residual variance otherwise), i.e. when
the remaining distance to the minimum is below ``xtol`` standard deviations. If λ grows
past 1e14 no representable descent remains (precision floor) and the fit also stops.

References
----------
.. [1] S. Baker and R. D. Cousins, "Clarification of the use of chi-square and likelihood
   functions in fits to histograms", Nucl. Instrum. Methods 221, 437-442 (1984).
.. [2] D. W. Marquardt, "An algorithm for least-squares estimation of nonlinear
   parameters", J. Soc. Ind. Appl. Math. 11, 431-441 (1963).
.. [3] J. J. Moré, "The Levenberg-Marquardt algorithm: implementation and theory",
   in Numerical Analysis, Lecture Notes in Mathematics 630, 105-116 (1978).
.. [4] K. Madsen, H. B. Nielsen and O. Tingleff, "Methods for non-linear least squares
   problems", 2nd ed., IMM, Technical University of Denmark (2004).
.. [5] B. Efron and D. V. Hinkley, "Assessing the accuracy of the maximum likelihood
   estimator: observed versus expected Fisher information", Biometrika 65, 457-483
   (1978).
"""

# Compiled kernels take their arrays positionally (numba calls them so from prange bodies).
# ruff: noqa: PLR0917

from __future__ import annotations

import math

import numpy as np
from numba import njit, prange

__all__ = ["CONVERGED", "MAX_ITER", "STALLED", "fused_pass_batch", "lm_batch"]

# fastmath without 'nnan'/'ninf': NaN and inf are meaningful values here.
_FASTMATH = {"contract", "arcp", "reassoc", "nsz", "afn"}

MAX_ITER = 0  # iteration limit reached
CONVERGED = 1  # Newton decrement below tolerance
STALLED = 2  # no representable descent left (λ > 1e14): at the precision floor

_LAMBDA0 = 1e-3
_LAMBDA_MAX = 1e14
_LAMBDA_MIN = 1e-15
_DIAG_FLOOR = 1e-300
_PIVOT_MIN = 1e-13  # on the unit-diagonal (scaled) matrix
_CHUNK = 16  # spectra per scratch allocation in lm_batch
# 1/(2j+1): ln t = 2 atanh(s) = 2 Σ s^(2j+1)/(2j+1), s = (t-1)/(t+1); for t in [1/2, 2]
# |s| ≤ 1/3, so 18 terms leave a relative error below 1e-18.
_ATANH = tuple(1.0 / (2 * j + 1) for j in range(18))


@njit(cache=True, fastmath=_FASTMATH, inline="always")
def _ln_near1(t):
    """ln t for t in [1/2, 2], to double precision, by the atanh series (no library call).

    The degree-17 polynomial in s² is evaluated by Estrin's scheme (pairs, then pairs of
    pairs, ...), whose dependency chain is four deep instead of Horner's seventeen.
    """
    s = (t - 1.0) / (t + 1.0)
    z = s * s
    z2 = z * z
    z4 = z2 * z2
    z8 = z4 * z4
    c = _ATANH
    q0 = (c[0] + c[1] * z) + (c[2] + c[3] * z) * z2
    q1 = (c[4] + c[5] * z) + (c[6] + c[7] * z) * z2
    q2 = (c[8] + c[9] * z) + (c[10] + c[11] * z) * z2
    q3 = (c[12] + c[13] * z) + (c[14] + c[15] * z) * z2
    q4 = c[16] + c[17] * z
    acc = (q0 + q1 * z4) + (q2 + q3 * z4) * z8 + q4 * (z8 * z8)
    return 2.0 * s * acc


@njit(cache=True, error_model="numpy", fastmath=_FASTMATH)
def _y_ln_y2(y):
    """2 Σ y ln y over the samples with y > 0 (the Poisson deviance's constant part).

    ln y = ln ȳ + ln(y/ȳ) with :func:`_ln_near1` where y/ȳ lies in [1/2, 2] (a vectorised
    loop); the few samples outside that range take the library logarithm.
    """
    n = y.shape[0]
    ref = 0.0
    for k in range(n):
        ref += y[k]
    ref = max(ref / n, 1.0)
    ln_ref = math.log(ref)
    inv_ref = 1.0 / ref
    acc = 0.0
    far = 0.0
    for k in range(n):
        t = y[k] * inv_ref
        near = 0.5 <= t <= 2.0
        far += 0.0 if near else 1.0
        acc += y[k] * (ln_ref + _ln_near1(t)) if near else 0.0
    if far > 0.0:
        for k in range(n):
            t = y[k] * inv_ref
            if y[k] > 0.0 and not 0.5 <= t <= 2.0:
                acc += y[k] * math.log(y[k])
    return 2.0 * acc


@njit(cache=True, error_model="numpy", fastmath=_FASTMATH)
def _pass(
    x, y, ylny2, p, n_dips, n_widths, hf_off, hf_w, has_slope, poisson, w0, w_ivar, jc, work, a, g
):
    """One fused pass: objective, Pearson χ², A = JᵀWJ and g = JᵀW r at ``p``.

    ``ylny2`` is ``_y_ln_y2(y)`` (the Poisson objective's constant; unused otherwise).

    The width prior adds ``w_ivar (G - w0)²`` to the objective for each width G (a no-op
    when ``w_ivar`` is 0), with its gradient and curvature; the Pearson χ² excludes it.

    ``jc`` (n_par, n_freq) receives the Jacobian column by column and ``work``
    (4, n_freq) holds per-sample scratch, so that every inner loop runs over the grid
    with unit stride (vectorisable); A and g are then dot products over the grid.
    """
    n_par = p.shape[0]
    n = x.shape[0]
    ib = 2 * n_dips + n_widths
    b = p[ib]
    s = p[ib + 1] if has_slope else 0.0
    base = work[0]
    ssum = work[1]
    wv = work[2]
    rv = work[3]
    for k in range(n):
        base[k] = b + s * x[k]
        ssum[k] = 0.0
    for i in range(n_widths):
        jw = jc[2 * n_dips + i]
        for k in range(n):
            jw[k] = 0.0
    for i in range(n_dips):
        c = p[i]
        con = p[n_dips + i]
        h = 0.5 * p[2 * n_dips + (i if n_widths > 1 else 0)]
        h2 = h * h
        jcen = jc[i]
        jcon = jc[n_dips + i]
        jw = jc[2 * n_dips + (i if n_widths > 1 else 0)]
        for m in range(hf_off.shape[0]):
            cm = c + hf_off[m]
            wm = hf_w[m]
            if m == 0:
                for k in range(n):
                    d = x[k] - cm
                    inv = 1.0 / (d * d + h2)
                    wl = wm * h2 * inv  # w_m L
                    jcon[k] = wl
                    jcen[k] = 2.0 * d * wl * inv  # dL/dc = 2 d h² / den²
                    wv[k] = d * d * wl * inv / h  # dL/dG = h d² / den² = d² L / (h den)
            else:
                for k in range(n):
                    d = x[k] - cm
                    inv = 1.0 / (d * d + h2)
                    wl = wm * h2 * inv
                    jcon[k] += wl
                    jcen[k] += 2.0 * d * wl * inv
                    wv[k] += d * d * wl * inv / h
        # Simple loops with few arrays each, so that the compiler vectorises them.
        for k in range(n):
            ssum[k] += con * jcon[k]
        for k in range(n):
            jcen[k] *= -con * base[k]
        for k in range(n):
            jw[k] -= con * base[k] * wv[k]
        for k in range(n):
            jcon[k] *= -base[k]
    jb = jc[ib]
    for k in range(n):
        jb[k] = 1.0 - ssum[k]
    if has_slope:
        js = jc[ib + 1]
        for k in range(n):
            js[k] = x[k] * jb[k]
    obj = 0.0
    pearson = 0.0
    if poisson:
        # Branch-free: with m = max(mu, 1) and e = min(mu - 1, 0), the deviance is
        # 2 (m - y - y ln m) + 2 (1 - y) e + e² plus the constant 2 y ln y (``ylny2``), the
        # weight 1/m. ln m = ln r + ln(m/r) with r = max(|b|, 1): m/r stays within
        # [1/2, 2] for dips up to half deep, where :func:`_ln_near1` needs no library call
        # and the loop vectorises; samples outside that range are summed again exactly.
        ref = max(abs(b), 1.0)
        ln_ref = math.log(ref)
        inv_ref = 1.0 / ref
        far = 0.0
        for k in range(n):
            mu = base[k] * jb[k]
            yk = y[k]
            r = yk - mu
            mc = max(mu, 1.0)
            e = min(mu - 1.0, 0.0)
            w = 1.0 / mc
            t = mc * inv_ref
            far += 1.0 if (t < 0.5 or t > 2.0) else 0.0
            obj += 2.0 * (mc - yk - yk * (ln_ref + _ln_near1(t))) + (2.0 * (1.0 - yk) + e) * e
            pearson += r * r * w
            wv[k] = w
            rv[k] = w * r
        if far > 0.0:
            obj = 0.0
            for k in range(n):
                mu = base[k] * jb[k]
                mc = max(mu, 1.0)
                e = min(mu - 1.0, 0.0)
                obj += 2.0 * (mc - y[k] - y[k] * math.log(mc)) + (2.0 * (1.0 - y[k]) + e) * e
        obj += ylny2
    else:
        for k in range(n):
            mu = base[k] * jb[k]
            r = y[k] - mu
            obj += r * r
            pearson += r * r / max(mu, 1.0)
            wv[k] = 1.0
            rv[k] = r
    for i in range(n_par):
        ji = jc[i]
        acc = 0.0
        for k in range(n):
            acc += ji[k] * rv[k]
        g[i] = acc
        for k in range(n):
            base[k] = wv[k] * ji[k]
        for j in range(i, n_par):
            jj = jc[j]
            acc = 0.0
            for k in range(n):
                acc += base[k] * jj[k]
            a[i, j] = acc
            a[j, i] = acc
    for i in range(2 * n_dips, 2 * n_dips + n_widths):
        dw = p[i] - w0
        obj += w_ivar * dw * dw
        g[i] -= w_ivar * dw
        a[i, i] += w_ivar
    return obj, pearson


@njit(cache=True, error_model="numpy", fastmath=_FASTMATH)
def _observed_info(
    x, y, p, n_dips, n_widths, hf_off, hf_w, has_slope, poisson, w0, w_ivar, fresh, jc, work, h, g
):
    """Observed information H (half the Hessian of the objective) at ``p``, into ``h``.

    ``H = Σ_k w2_k J_k J_kᵀ - Σ_k rw_k ∂²mu_k``: for Poisson counts with mu ≥ 1,
    ``w2 = y/mu²`` and ``rw = (y - mu)/mu``; on the quadratic continuation below mu = 1 and
    for least squares, ``w2 = 1`` and ``rw = y - mu``. The second derivatives of the model
    are analytic (unit-height Lorentzian L = h²u, u = 1/(d² + h²), d = x - c, h = G/2):
    ∂²L/∂c² = 2h²u²(4d²u - 1), ∂²L/∂c∂G = 2dhu²(1 - 2h²u), ∂²L/∂G² = ½d²u²(1 - 4h²u).
    The width prior adds ``w_ivar`` to each width's diagonal. ``fresh``: ``jc`` already
    holds the Jacobian at ``p`` (the last pass was at ``p``); otherwise a pass computes
    it. ``work`` and ``g`` are scratch as in :func:`_pass`.
    """
    n_par = p.shape[0]
    n = x.shape[0]
    if not fresh:
        _pass(
            x,
            y,
            0.0,
            p,
            n_dips,
            n_widths,
            hf_off,
            hf_w,
            has_slope,
            poisson,
            w0,
            w_ivar,
            jc,
            work,
            h,
            g,
        )
    ib = 2 * n_dips + n_widths
    b = p[ib]
    s = p[ib + 1] if has_slope else 0.0
    base = work[0]
    w2 = work[1]
    rw = work[2]
    tmp = work[3]
    for k in range(n):
        base[k] = b + s * x[k]
        mu = base[k] * jc[ib][k]
        yk = y[k]
        if poisson and mu >= 1.0:
            w2[k] = yk / (mu * mu)
            rw[k] = (yk - mu) / mu
        else:
            w2[k] = 1.0
            rw[k] = yk - mu
    for i in range(n_par):
        ji = jc[i]
        for k in range(n):
            tmp[k] = w2[k] * ji[k]
        for j in range(i, n_par):
            jj = jc[j]
            acc = 0.0
            for k in range(n):
                acc += tmp[k] * jj[k]
            h[i, j] = acc
    # minus Σ rw ∂²mu, dip by dip (∂²mu is zero between different dips)
    for i in range(n_dips):
        c = p[i]
        con = p[n_dips + i]
        iw = 2 * n_dips + (i if n_widths > 1 else 0)
        hh = 0.5 * p[iw]
        h2 = hh * hh
        s_cc = 0.0  # Σ rw B ∂²ℓ/∂c²
        s_c = 0.0  # Σ rw B ∂ℓ/∂c
        s_cg = 0.0  # Σ rw B ∂²ℓ/∂c∂G
        s_g = 0.0  # Σ rw B ∂ℓ/∂G
        s_gg = 0.0  # Σ rw B ∂²ℓ/∂G²
        t_c = 0.0  # Σ rw ∂ℓ/∂c, and with a factor x (slope)
        t_l = 0.0
        t_g = 0.0
        u_c = 0.0
        u_l = 0.0
        u_g = 0.0
        for m in range(hf_off.shape[0]):
            cm = c + hf_off[m]
            wm = hf_w[m]
            for k in range(n):
                d = x[k] - cm
                u = 1.0 / (d * d + h2)
                lv = wm * h2 * u
                lc = 2.0 * d * lv * u
                lg = hh * d * d * wm * u * u
                lcc = 2.0 * lv * u * (4.0 * d * d * u - 1.0)
                lcg = 2.0 * d * hh * wm * u * u * (1.0 - 2.0 * h2 * u)
                lgg = 0.5 * d * d * wm * u * u * (1.0 - 4.0 * h2 * u)
                rb = rw[k] * base[k]
                s_cc += rb * lcc
                s_c += rb * lc
                s_cg += rb * lcg
                s_g += rb * lg
                s_gg += rb * lgg
                t_c += rw[k] * lc
                t_l += rw[k] * lv
                t_g += rw[k] * lg
                u_c += rw[k] * x[k] * lc
                u_l += rw[k] * x[k] * lv
                u_g += rw[k] * x[k] * lg
        ic = i
        ik = n_dips + i
        # ∂²mu: cc = -B C ℓcc, cC = -B ℓc, cG = -B C ℓcG, CG = -B ℓG, GG = -B C ℓGG,
        # cb = -C ℓc, Cb = -ℓ, Gb = -C ℓG (and x times these for the slope)
        h[ic, ic] += con * s_cc
        h[min(ic, ik), max(ic, ik)] += s_c
        h[min(ic, iw), max(ic, iw)] += con * s_cg
        h[min(ik, iw), max(ik, iw)] += s_g
        h[iw, iw] += con * s_gg
        h[ic, ib] += con * t_c
        h[ik, ib] += t_l
        h[iw, ib] += con * t_g
        if has_slope:
            h[ic, ib + 1] += con * u_c
            h[ik, ib + 1] += u_l
            h[iw, ib + 1] += con * u_g
    for i in range(2 * n_dips, 2 * n_dips + n_widths):
        h[i, i] += w_ivar
    for i in range(n_par):
        for j in range(i + 1, n_par):
            h[j, i] = h[i, j]


@njit(cache=True, error_model="numpy", fastmath=_FASTMATH)
def _factor(a, dmax, lam, free, m, sc):
    """Cholesky factor (lower, in ``m``) of the free block of S (A + λ diag(dmax)) S.

    The diagonal of ``m`` holds the factor's reciprocal diagonal (the substitutions
    multiply instead of divide).

    S = diag(``sc``), ``sc = 1/√dmax`` on the free parameters, scales the system to a unit
    diagonal (Jacobi) before factorisation; held parameters get a unit row. Returns False
    when the matrix is not numerically positive definite.
    """
    n = a.shape[0]
    for i in range(n):
        sc[i] = 1.0 / math.sqrt(dmax[i]) if free[i] else 0.0
    for i in range(n):
        for j in range(i + 1):
            m[i, j] = a[i, j] * sc[i] * sc[j]
        m[i, i] = m[i, i] + lam if free[i] else 1.0
    for j in range(n):
        sdiag = m[j, j]
        for k in range(j):
            sdiag -= m[j, k] * m[j, k]
        if not sdiag > _PIVOT_MIN:
            return False
        inv = 1.0 / math.sqrt(sdiag)
        m[j, j] = inv
        for i in range(j + 1, n):
            sv = m[i, j]
            for k in range(j):
                sv -= m[i, k] * m[j, k]
            m[i, j] = sv * inv
    return True


@njit(cache=True, error_model="numpy", fastmath=_FASTMATH)
def _substitute(m, sc, g, delta):
    """δ = S (L Lᵀ)⁻¹ S g with the factor of :func:`_factor` (held parameters get 0)."""
    n = g.shape[0]
    for i in range(n):
        sv = g[i] * sc[i]
        for k in range(i):
            sv -= m[i, k] * delta[k]
        delta[i] = sv * m[i, i]
    for i in range(n - 1, -1, -1):
        sv = delta[i]
        for k in range(i + 1, n):
            sv -= m[k, i] * delta[k]
        delta[i] = sv * m[i, i]
    for i in range(n):
        delta[i] *= sc[i]


@njit(cache=True, error_model="numpy", fastmath=_FASTMATH)
def _solve(a, dmax, lam, g, free, m, sc, delta):
    """Solve (A + λ diag(dmax)) δ = g on the free parameters (held ones get δ = 0).

    Returns False when the matrix is not numerically positive definite.
    """
    if not _factor(a, dmax, lam, free, m, sc):
        return False
    _substitute(m, sc, g, delta)
    return True


@njit(cache=True, error_model="numpy", fastmath=_FASTMATH)
def _free_set(p, g, a, dmax, lo, hi, free):
    """Mark parameters free unless on a bound with an outward gradient or degenerate."""
    for i in range(p.shape[0]):
        held = (p[i] <= lo[i] and g[i] < 0.0) or (p[i] >= hi[i] and g[i] > 0.0)
        degenerate = not a[i, i] > 1e-14 * dmax[i]
        free[i] = not (held or degenerate)


@njit(cache=True, error_model="numpy", fastmath=_FASTMATH)
def _fit_one(
    x,
    y,
    p,
    lo,
    hi,
    n_dips,
    n_widths,
    hf_off,
    hf_w,
    has_slope,
    poisson,
    w0,
    w_ivar,
    max_iter,
    xtol,
    sigma,
    ws,
    wm,
    wv,
    free,
):
    """Fit one spectrum in place; returns (Pearson χ² per dof, objective, iterations, code).

    The objective is the likelihood-ratio χ² (or the sum of squares) at the solution,
    without the width prior's term.

    Scratch space, every element written before it is read: ``ws`` (n_par + 4, n_freq),
    ``wm`` (3, n_par, n_par), ``wv`` (6, n_par), ``free`` (n_par,) bool.
    """
    n_par = p.shape[0]
    n_free_dof = max(x.shape[0] - n_par, 1)
    jc = ws[:n_par]
    work = ws[n_par:]
    a = wm[0]
    at = wm[1]
    m = wm[2]
    g = wv[0]
    gt = wv[1]
    delta = wv[2]
    pt = wv[3]
    dmax = wv[4]
    sc = wv[5]
    for i in range(n_par):
        p[i] = min(max(p[i], lo[i]), hi[i])
    ylny2 = _y_ln_y2(y) if poisson else 0.0
    obj, pear = _pass(
        x,
        y,
        ylny2,
        p,
        n_dips,
        n_widths,
        hf_off,
        hf_w,
        has_slope,
        poisson,
        w0,
        w_ivar,
        jc,
        work,
        a,
        g,
    )
    for i in range(n_par):
        dmax[i] = max(a[i, i], _DIAG_FLOOR)
    ybar = 0.0
    for k in range(y.shape[0]):
        ybar += abs(y[k])
    ybar /= y.shape[0]
    s2_floor = (1e-9 * ybar) ** 2 + _DIAG_FLOOR
    lam = _LAMBDA0
    nu = 2.0
    code = MAX_ITER
    it = 0
    fresh = True  # jc holds the Jacobian at p
    while it < max_iter:
        it += 1
        _free_set(p, g, a, dmax, lo, hi, free)
        ok = _solve(a, dmax, lam, g, free, m, sc, delta)
        rho = -1.0
        objt = 0.0
        peart = 0.0
        if ok:
            pred = 0.0
            for i in range(n_par):
                pt[i] = min(max(p[i] + delta[i], lo[i]), hi[i])
                delta[i] = pt[i] - p[i]
            for i in range(n_par):
                pred += 2.0 * delta[i] * g[i]
                for j in range(n_par):
                    pred -= delta[i] * a[i, j] * delta[j]
            objt, peart = _pass(
                x,
                y,
                ylny2,
                pt,
                n_dips,
                n_widths,
                hf_off,
                hf_w,
                has_slope,
                poisson,
                w0,
                w_ivar,
                jc,
                work,
                at,
                gt,
            )
            if pred > 0.0 and math.isfinite(objt):
                rho = (obj - objt) / pred
        if ok:
            fresh = False  # the trial pass left jc at pt
        if rho > 1e-4:
            fresh = True  # pt becomes p
            for i in range(n_par):
                p[i] = pt[i]
            a, at = at, a
            g, gt = gt, g
            obj = objt
            pear = peart
            for i in range(n_par):
                dmax[i] = max(dmax[i], a[i, i])
            lam *= max(1.0 / 3.0, 1.0 - (2.0 * rho - 1.0) ** 3)
            lam = max(lam, _LAMBDA_MIN)
            nu = 2.0
            # Newton decrement on the free set at the new point
            _free_set(p, g, a, dmax, lo, hi, free)
            s2 = 1.0 if poisson else max(obj / n_free_dof, s2_floor)
            if _solve(a, dmax, 0.0, g, free, m, sc, delta):
                dec = 0.0
                for i in range(n_par):
                    dec += g[i] * delta[i]
                if dec <= xtol * xtol * s2:
                    code = CONVERGED
                    break
        else:
            lam *= nu
            nu *= 2.0
            if lam > _LAMBDA_MAX:
                code = STALLED
                break
    # 1σ from the inverse of the observed information at the solution (Efron & Hinkley
    # [5]_), or of A where that is not positive definite; scaled by s² when unweighted.
    s2 = 1.0 if poisson else obj / n_free_dof
    for i in range(n_par):
        free[i] = a[i, i] > 1e-14 * dmax[i]
    _observed_info(
        x,
        y,
        p,
        n_dips,
        n_widths,
        hf_off,
        hf_w,
        has_slope,
        poisson,
        w0,
        w_ivar,
        fresh,
        jc,
        work,
        at,
        gt,
    )
    done = _inverse_diag(at, dmax, free, gt, m, sc, s2, sigma)
    if not done and not _inverse_diag(a, dmax, free, gt, m, sc, s2, sigma):
        for i in range(n_par):
            sigma[i] = np.inf
    for i in range(2 * n_dips, 2 * n_dips + n_widths):
        obj -= w_ivar * (p[i] - w0) * (p[i] - w0)
    return pear / n_free_dof, obj, it, code


@njit(cache=True, error_model="numpy", fastmath=_FASTMATH)
def _inverse_diag(a, dmax, free, e, m, sc, s2, sigma):
    """sigma = sqrt(s² diag(a⁻¹)) on the free set (NaN elsewhere); False if not PD.

    With S a S = L Lᵀ (:func:`_factor`), (a⁻¹)ⱼⱼ = sⱼ² Σₖ (L⁻¹)ₖⱼ²: column j of L⁻¹ by
    forward substitution from row j, into ``e``.
    """
    n_par = a.shape[0]
    for i in range(n_par):
        sigma[i] = np.nan
    if not _factor(a, dmax, 0.0, free, m, sc):
        return False
    for j in range(n_par):
        if not free[j]:
            continue
        e[j] = m[j, j]
        acc = e[j] * e[j]
        for i in range(j + 1, n_par):
            sv = 0.0
            for k in range(j, i):
                sv += m[i, k] * e[k]
            e[i] = -sv * m[i, i]
            acc += e[i] * e[i]
        var = acc * sc[j] * sc[j] * s2
        if not (var > 0.0 and math.isfinite(var)):
            return False
        sigma[j] = math.sqrt(var)
    return True


@njit(cache=True, error_model="numpy", fastmath=_FASTMATH, parallel=True)
def lm_batch(
    x,
    y,
    p,
    lo,
    hi,
    n_dips,
    n_widths,
    hf_off,
    hf_w,
    has_slope,
    poisson,
    w0,
    w_ivar,
    max_iter,
    xtol,
):
    """Fit every row of ``y`` in place of ``p``.

    Parameters
    ----------
    x : ndarray, shape (n_freq,)
        Scaled frequency grid (dimensionless), float64.
    y : ndarray, shape (n_spec, n_freq)
        Counts, float64, C-contiguous.
    p : ndarray, shape (n_spec, n_par)
        Initial parameters (scaled units); overwritten with the solution.
    lo, hi : ndarray, shape (n_spec, n_par)
        Box bounds of each row (scaled units; ±inf allowed; equal bounds hold a
        parameter fixed, as a profile likelihood needs).
    n_dips, n_widths : int
        Number of dips and of width parameters (1 when shared).
    hf_off, hf_w : ndarray, shape (n_hf,)
        Offsets (scaled) and weights of each dip's hyperfine components.
    has_slope, poisson : int
        1 to fit the baseline slope / to use Poisson weights.
    w0, w_ivar : float
        Gaussian prior on every width (scaled): centre and inverse variance, in units of
        the objective (χ²); ``w_ivar = 0`` fits without it.
    max_iter : int
        Iteration limit per spectrum.
    xtol : float
        Convergence tolerance, in standard deviations of the parameters.

    Returns
    -------
    sigma : ndarray, shape (n_spec, n_par)
        1σ of each parameter (NaN where undetermined, inf for a singular matrix).
    chi2_red : ndarray, shape (n_spec,)
        Pearson χ² (weights 1/max(mu, 1)) per degree of freedom.
    objective : ndarray, shape (n_spec,)
        The objective at the solution without the width prior: the likelihood-ratio χ²
        (Poisson), or the sum of squares; differences between models are likelihood-ratio
        statistics.
    n_iter : ndarray of int32, shape (n_spec,)
    code : ndarray of int8, shape (n_spec,)
        :data:`CONVERGED`, :data:`STALLED` or :data:`MAX_ITER`.
    """
    n_spec, n_par = p.shape
    sigma = np.empty((n_spec, n_par))
    chi2 = np.empty(n_spec)
    objective = np.empty(n_spec)
    n_iter = np.empty(n_spec, dtype=np.int32)
    code = np.empty(n_spec, dtype=np.int8)
    # Spectra in chunks of _CHUNK, each with its own scratch space (allocated once per
    # chunk, not per spectrum); results do not depend on the chunking.
    n_chunk = (n_spec + _CHUNK - 1) // _CHUNK
    for ci in prange(n_chunk):
        ws = np.empty((n_par + 4, x.shape[0]))
        wm = np.empty((3, n_par, n_par))
        wv = np.empty((6, n_par))
        free = np.empty(n_par, dtype=np.bool_)
        for sidx in range(ci * _CHUNK, min((ci + 1) * _CHUNK, n_spec)):
            _fit_into(
                x,
                y,
                p,
                lo,
                hi,
                n_dips,
                n_widths,
                hf_off,
                hf_w,
                has_slope,
                poisson,
                w0,
                w_ivar,
                max_iter,
                xtol,
                sigma,
                chi2,
                objective,
                n_iter,
                code,
                sidx,
                ws,
                wm,
                wv,
                free,
            )
    return sigma, chi2, objective, n_iter, code


@njit(cache=True, error_model="numpy", fastmath=_FASTMATH)
def _fit_into(
    x,
    y,
    p,
    lo,
    hi,
    n_dips,
    n_widths,
    hf_off,
    hf_w,
    has_slope,
    poisson,
    w0,
    w_ivar,
    max_iter,
    xtol,
    sigma,
    chi2,
    objective,
    n_iter,
    code,
    sidx,
    ws,
    wm,
    wv,
    free,
):
    """Fit spectrum ``sidx`` of the batch and store its results."""
    c2, obj, it, cd = _fit_one(
        x,
        y[sidx],
        p[sidx],
        lo[sidx],
        hi[sidx],
        n_dips,
        n_widths,
        hf_off,
        hf_w,
        has_slope,
        poisson,
        w0,
        w_ivar,
        max_iter,
        xtol,
        sigma[sidx],
        ws,
        wm,
        wv,
        free,
    )
    chi2[sidx] = c2
    objective[sidx] = obj
    n_iter[sidx] = it
    code[sidx] = cd


@njit(cache=True, error_model="numpy", fastmath=_FASTMATH, parallel=True)
def fused_pass_batch(x, y, p, n_dips, n_widths, hf_off, hf_w, has_slope, poisson):
    """One fused model+Jacobian+normal-equation pass per spectrum (the cost floor).

    Same arguments as :func:`lm_batch`; returns the objective per spectrum, shape
    (n_spec,). Used by the throughput benchmark to express an iteration's cost.
    """
    n_spec, n_par = p.shape
    out = np.empty(n_spec)
    for sidx in prange(n_spec):
        jc = np.empty((n_par, x.shape[0]))
        work = np.empty((4, x.shape[0]))
        a = np.empty((n_par, n_par))
        g = np.empty(n_par)
        obj, _ = _pass(
            x,
            y[sidx],
            _y_ln_y2(y[sidx]) if poisson else 0.0,
            p[sidx],
            n_dips,
            n_widths,
            hf_off,
            hf_w,
            has_slope,
            poisson,
            0.0,
            0.0,
            jc,
            work,
            a,
            g,
        )
        out[sidx] = obj
    return out
