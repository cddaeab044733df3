"""Many spatial model fits at once: a vectorised Levenberg-Marquardt over a (rows, parameters) array.

:mod:`map2d.fit.spatial` fits one map with :func:`scipy.optimize.least_squares`, one model and one start
at a time. For hundreds of cells that is mostly interpreter overhead: a 24 x 32 map has 768 pixels and
6-8 parameters, so each step is a few microseconds of arithmetic wrapped in a hundred of bookkeeping.
Here every start of every cell is one row of a ``(rows, parameters)`` array and all rows advance
together: the residuals and the analytic Jacobians (the parameterisations of :mod:`map2d.fit.spatial`:
``_gauss_jac``, ``_dog_jac``, ``_gabor_jac``) are computed for all rows in one pass over a
``(rows, parameters, pixels)`` array, the normal matrices ``J^T J`` by one stacked matrix product, and
the damped steps by one stacked solve. Rows that have converged leave the active set, so the late
iterations only cost what the slow rows need.

The method is Levenberg-Marquardt with Marquardt's scaling (the damping is ``lambda diag(J^T J)``, the
largest diagonal seen so far, so the step is invariant to the parameters' units, like
``least_squares(x_scale='jac')``) and Nielsen's update of ``lambda`` from the gain ratio (Madsen, Nielsen
& Tingleff 2004, Methods for Non-Linear Least Squares Problems, 2nd ed., section 3.2; More 1978, The
Levenberg-Marquardt algorithm: implementation and theory, Lecture Notes in Mathematics 630).
Bounds are kept by projection with an active set: a parameter at a bound whose gradient points outside
is held fixed for that step, the step of the others is solved for, and the new point is clipped to the
box. Stopping follows MINPACK's tests with the reference's tolerances (1e-8): the relative decrease of
the cost, the relative size of the step, and the largest cosine between the residual and a free
Jacobian column (More, Garbow & Hillstrom 1980, User guide for MINPACK-1, ANL-80-74). A row also stops
once what is left to gain is below the noise: when the Gauss-Newton step ``delta = -H^-1 g`` (``H = J^T J``,
free parameters) moves no parameter by more than :data:`STOP_SDS` of its standard error. With the Wald
covariance ``s^2 H^-1`` (``s^2`` the residual variance), Cauchy-Schwarz gives
``|delta_i| <= se_i sqrt(delta^T H delta / s^2)`` for every parameter ``i``, so the test is
``g^T H^-1 g <= STOP_SDS^2 s^2``: one stacked solve per iteration, and the late iterations that only
polish digits far inside the intervals are not run.

When several models compete for each map (:func:`fit_choosing`, used by ``locate_fields`` and
``fit_maps``), every fit first gets :data:`SETTLE_EVALS` evaluations per run to convergence; only the fits
that can be reported (the chosen model, those ranked before it and rejected by the checks, and any within
``map2d.fit.spatial.REFINE_MARGIN_BIC`` of it) are then run to convergence. Most of the evaluations of a
multi-model fit went to models that lose by far: a Gabor fitted to a blob slides toward zero frequency,
a DoG toward no surround, along valleys where every step gains a millionth of the cost. Their criteria
come from the shorter run (a few units above convergence at most, measured); the reported fits are
those of the full budgets.

Starts, bounds, the multi-start rule (a short run from every start, the best continued to convergence),
the reported parameters, the information criteria and the intervals (HC3 sandwich) are those of
:mod:`map2d.fit.spatial` (the same functions are called); only the optimiser differs.
``tests/test_fit_batched.py`` checks that the two agree within the reported intervals on simulated
cells and on the held-out generator's sessions.

Memory: rows are advanced in chunks so that the Jacobian and its temporaries stay within
:data:`CHUNK_BYTES` whatever the number of cells.
"""

from __future__ import annotations

import math

import numpy as np

__all__ = ["fit_models", "fit_choosing", "CHUNK_BYTES"]

#: Memory for one chunk of rows (the Jacobian and the per-pixel temporaries of the residual).
CHUNK_BYTES = 48 * 2**20
#: Evaluations of each start before the best start of a cell is chosen (the reference screens for 12).
#: Measured with 6 against 12 on the benchmark's all-responsive session, a simulated 200-cell session and
#: the held-out generator's sessions: the same model, centre method and check for every cell, every
#: parameter within 0.013 of its 95 % half-width, and a fifth less CPU on the benchmark session.
SCREEN_EVALS = 6
#: Evaluations allowed for the run to convergence.
MAX_EVALS = 300
#: Evaluations of the best start on a window (:data:`WINDOW_SDS`) before it moves to the whole grid.
WINDOW_EVALS = 50
TOL = 1e-8
#: A row also stops when its Gauss-Newton step is at most this many standard errors of each parameter.
STOP_SDS = 0.01

_N_PARAMS = {"gaussian": 6, "dog": 6, "gabor": 8}


# --------------------------------------------------------------------------------------------------
# residuals and Jacobians of many rows: p (n, k); x (1 or n, 1, wx), y (1 or n, wy, 1) the pixel
# positions of a rectangular window (rows and columns of the grid); d, w (n, wy, wx).
# Residuals are (n, wy, wx); Jacobians (n, k, wy, wx), so that J J^T and J r are stacked matrix products
# --------------------------------------------------------------------------------------------------

def _cols(p):
    return [p[:, i, None, None] for i in range(p.shape[1])]


def _gauss_rj(p, x, y, d, w, jac=True):
    x0, y0, su, sv, th, A = _cols(p)
    c, s = np.cos(th), np.sin(th)
    dx, dy = x - x0, y - y0
    u = dx * c + dy * s
    v = -dx * s + dy * c
    au, av = u / su**2, v / sv**2
    Ew = np.exp(-0.5 * (u * au + v * av)) * w
    r = A * Ew - d * w
    if not jac:
        return r, None
    AE = A * Ew
    J = np.empty((p.shape[0], 6) + d.shape[1:])
    J[:, 0] = AE * (au * c - av * s)
    J[:, 1] = AE * (au * s + av * c)
    J[:, 2] = AE * (u * au) / su
    J[:, 3] = AE * (v * av) / sv
    J[:, 4] = -AE * u * v * (1 / su**2 - 1 / sv**2)
    J[:, 5] = Ew
    return r, J


def _dog_rj(p, x, y, d, w, jac=True):
    x0, y0, kc, rc, ks, m = _cols(p)
    rs = rc * m
    dx, dy = x - x0, y - y0
    r2 = dx * dx + dy * dy
    Ec = np.exp(-r2 / rc**2) * w
    Es = np.exp(-r2 / rs**2) * w
    r = kc * Ec - ks * Es - d * w
    if not jac:
        return r, None
    a = kc * Ec * (2 / rc**2)
    b = ks * Es * (2 / rs**2)
    J = np.empty((p.shape[0], 6) + d.shape[1:])
    ab = a - b
    J[:, 0] = ab * dx
    J[:, 1] = ab * dy
    J[:, 2] = Ec
    bs = b * r2 / rs
    J[:, 3] = a * r2 / rc - bs * m
    J[:, 4] = -Es
    J[:, 5] = -bs * rc
    return r, J


def _gabor_rj(p, x, y, d, w, jac=True):
    x0, y0, su, sv, kx, ky, a, b = _cols(p)
    f = np.maximum(np.hypot(kx, ky), 1e-12)
    c, s = kx / f, ky / f
    dx, dy = x - x0, y - y0
    u = dx * c + dy * s
    v = -dx * s + dy * c
    au, av = u / su**2, v / sv**2
    E = np.exp(-0.5 * (u * au + v * av)) * w
    tp = 2 * np.pi
    # the carrier's phase is a sum of a column term and a row term: cos and sin of each, then combined
    # (the angle-sum identities), so the trigonometric functions run over wx + wy values, not wx * wy
    px, py = tp * kx * dx, tp * ky * dy
    cx, sx, cy, sy = np.cos(px), np.sin(px), np.cos(py), np.sin(py)
    Ecp = E * (cx * cy - sx * sy)
    Esp = E * (sx * cy + cx * sy)
    r = a * Ecp + b * Esp - d * w
    if not jac:
        return r, None
    EC = r + d * w                 # E (a cos + b sin)
    ES = b * Ecp - a * Esp         # E dC/dphase
    q_th = (u * v) * (1 / su**2 - 1 / sv**2) * EC
    J = np.empty((p.shape[0], 8) + d.shape[1:])
    J[:, 0] = -tp * kx * ES + EC * (au * c - av * s)
    J[:, 1] = -tp * ky * ES + EC * (au * s + av * c)
    J[:, 2] = EC * (u * au) / su
    J[:, 3] = EC * (v * av) / sv
    J[:, 4] = tp * dx * ES + q_th * (ky / f**2)
    J[:, 5] = tp * dy * ES - q_th * (kx / f**2)
    J[:, 6] = Ecp
    J[:, 7] = Esp
    return r, J


_RJ = {"gaussian": _gauss_rj, "dog": _dog_rj, "gabor": _gabor_rj}


# --------------------------------------------------------------------------------------------------
# Levenberg-Marquardt, rows at once
# --------------------------------------------------------------------------------------------------

def _normal(J, r):
    """``J J^T`` (n, k, k) and ``J r`` (n, k) of Jacobians (n, k, ...) and residuals (n, ...)."""
    n, k = J.shape[:2]
    J = J.reshape(n, k, -1)
    return J @ J.transpose(0, 2, 1), (J @ r.reshape(n, -1, 1))[:, :, 0]


def _sumsq(r):
    r = r.reshape(r.shape[0], -1)
    return np.einsum("ij,ij->i", r, r)


def _lm(model, p, lo, hi, x, y, d, w, max_evals, tol=TOL, sds=STOP_SDS):
    """Advance every row of ``p`` (n, k) to a local minimum of ``0.5 sum(r^2)`` within ``[lo, hi]``.

    ``x`` (n or 1, 1, wx), ``y`` (n or 1, wy, 1): pixel positions; ``d``, ``w`` (n, wy, wx): data and
    weights (0 at pixels not used); ``max_evals``: (n,) evaluations allowed per row (the first included);
    ``sds``: a row also stops when its Gauss-Newton step is at most this many standard errors of every
    parameter (module notes; 0: the MINPACK tests only).
    Returns ``p``, ``cost`` (n,) and ``status`` (n,): 1 converged, 0 out of evaluations, -1 failed.
    """
    rj = _RJ[model]
    p = np.array(p, float)
    n, k = p.shape
    r, J = rj(p, x, y, d, w)
    cost = 0.5 * _sumsq(r)
    H, g = _normal(J, r)
    del J, r
    status = np.zeros(n, int)
    status[~(np.isfinite(cost) & np.isfinite(H).all(axis=(1, 2)))] = -1
    # residual degrees of freedom: the pixels of non-zero weight less the parameters
    dof = np.maximum(np.count_nonzero(w.reshape(w.shape[0], -1), axis=1) - k, 1)
    dof = np.broadcast_to(dof, (n,))
    diag = np.arange(k) * (k + 1)                     # the diagonal of a flattened (k, k)
    dsq = H.reshape(n, k * k)[:, diag].copy()
    lam = np.full(n, 1e-3)
    nu = np.full(n, 2.0)
    evals = np.ones(n, int)
    eye = np.eye(k)
    per_row = x.shape[0] > 1
    while True:
        act = np.flatnonzero((status == 0) & (evals < max_evals))
        if act.size == 0:
            break
        pa, ga, Ha, ca = p[act], g[act], H[act], cost[act]
        loa, hia = lo[act], hi[act]
        fixed = ((pa <= loa) & (ga > 0)) | ((pa >= hia) & (ga < 0))
        D = dsq[act]
        D = np.maximum(D, 1e-12 * D.max(axis=1, keepdims=True) + 1e-300)
        # convergence by the gradient: largest cosine between the residual and a free Jacobian column
        gs = np.abs(ga) / np.sqrt(D)
        any_fixed = fixed.any()
        if any_fixed:
            gs[fixed] = 0.0
        done = gs.max(axis=1) <= tol * np.sqrt(np.maximum(2 * ca, 1e-300))
        rhs = -ga
        A0 = Ha.copy()
        if any_fixed:                               # held at their bound for this step
            ff = fixed[:, :, None] | fixed[:, None, :]
            A0[ff] = 0.0
            A0.reshape(-1, k * k)[:, diag] += fixed
            rhs = np.where(fixed, 0.0, rhs)
        ok = np.isfinite(A0).all(axis=(1, 2)) & np.isfinite(rhs).all(axis=1)
        if not ok.all():
            A0[~ok] = eye
            rhs[~ok] = 0.0
        if sds > 0:
            # the Gauss-Newton step's size in standard errors: for every parameter i,
            # |step_i| <= se_i sqrt(step' H step / s2) (Cauchy-Schwarz), with step' H step = g' H^-1 g
            A = A0.copy()
            A.reshape(-1, k * k)[:, diag] += 1e-10 * D
            gn = _solve_rows(A, rhs)
            dec = (gn * rhs).sum(axis=1)
            s2 = 2 * ca / dof[act]
            done |= ok & (dec <= sds * sds * s2)
        if done.any():
            status[act[done]] = 1
            keep = ~done
            act, pa, ga, Ha, ca, loa, hia, D, A0, rhs, ok = (v[keep] for v in (act, pa, ga, Ha, ca, loa, hia, D,
                                                                                A0, rhs, ok))
            if act.size == 0:
                continue
        la = lam[act]
        A = A0
        A.reshape(-1, k * k)[:, diag] += la[:, None] * D
        delta = _solve_rows(A, rhs)
        pn = np.clip(pa + delta, loa, hia)
        step = pn - pa
        if per_row:
            rn, Jn = rj(pn, x[act], y[act], d[act], w[act])
        else:
            rn, Jn = rj(pn, x, y, d[act], w[act])
        cn = 0.5 * _sumsq(rn)
        evals[act] += 1
        pred = -((step * ga).sum(axis=1) + 0.5 * (step * (Ha @ step[:, :, None])[:, :, 0]).sum(axis=1))
        actual = ca - cn
        good = ok & (actual > 0)                         # NaN compares False
        # accepted rows: new point, normal equations, damping down
        sel = np.flatnonzero(good)
        if sel.size:
            Hn, gn = _normal(Jn[sel], rn[sel])
            finite = np.isfinite(Hn).all(axis=(1, 2)) & np.isfinite(gn).all(axis=1)
            if not finite.all():
                good[sel[~finite]] = False
                sel, Hn, gn = sel[finite], Hn[finite], gn[finite]
            ia = act[sel]
            p[ia], H[ia], g[ia] = pn[sel], Hn, gn
            dsq[ia] = np.maximum(dsq[ia], Hn.reshape(-1, k * k)[:, diag])
            old = ca[sel]
            cost[ia] = cn[sel]
            ps = pred[sel]
            rho = np.where(ps > 0, actual[sel] / np.where(ps > 0, ps, 1.0), 0.0)
            lam[ia] *= np.maximum(1 / 3, 1 - (2 * rho - 1) ** 3)
            nu[ia] = 2.0
            conv_f = (actual[sel] <= tol * old) & (ps <= tol * old)
            status[ia[conv_f]] = 1
        del Jn, rn
        # rejected rows: damping up
        ir = act[~good]
        lam[ir] *= nu[ir]
        nu[ir] *= 2
        # the step test (either way), and a damping no step survives
        small = np.sqrt((step * step).sum(axis=1)) <= tol * (tol + np.sqrt((pa * pa).sum(axis=1)))
        stop = (small | (lam[act] > 1e16)) & (status[act] == 0)
        status[act[stop]] = 1
    return p, cost, status


def _solve_rows(A, b):
    """Solutions of the stacked systems ``A x = b`` (m, k, k), (m, k); a singular row by least squares."""
    try:
        return np.linalg.solve(A, b[:, :, None])[:, :, 0]
    except np.linalg.LinAlgError:
        return np.stack([np.linalg.lstsq(Ai, bi, rcond=None)[0] for Ai, bi in zip(A, b)])


def _lm_chunked(model, p, lo, hi, x, y, d, w, max_evals, rows_of):
    """:func:`_lm` in chunks of rows (:data:`CHUNK_BYTES`); row ``i`` fits problem ``rows_of[i]`` of the
    per-problem arrays ``x`` (m, 1, wx), ``y`` (m, wy, 1), ``d``, ``w`` (m, wy, wx)."""
    n, k = p.shape
    P = d.shape[1] * d.shape[2]
    size = max(1, int(CHUNK_BYTES // (8 * P * (2 * k + 16))))
    out_p, out_c, out_s = np.empty_like(p), np.empty(n), np.empty(n, int)
    for a in range(0, n, size):
        b = min(n, a + size)
        m = rows_of[a:b]
        xm, ym = (x[m], y[m]) if x.shape[0] > 1 else (x, y)
        out_p[a:b], out_c[a:b], out_s[a:b] = _lm(model, p[a:b], lo[a:b], hi[a:b], xm, ym, d[m], w[m],
                                                 max_evals[a:b])
    return out_p, out_c, out_s


# --------------------------------------------------------------------------------------------------
# many problems, one model
# --------------------------------------------------------------------------------------------------

def _solve_many(model, setups, x, y, d, w, max_evals=MAX_EVALS):
    """Multi-start least squares for every problem with a setup (``(starts, lo, hi)`` or None).

    As the reference (:func:`map2d.fit.spatial._solve`), with a shorter screen: one start runs to
    convergence; several get :data:`SCREEN_EVALS` evaluations each, and the best of them (lowest cost) is run to convergence
    unless it converged already. Every start of every problem is advanced in the same batch.
    ``x``, ``y``, ``d``, ``w``: per-problem pixel positions, data and weights (:func:`_lm_chunked`).
    Returns the internal parameters (m, k) (NaN where no start succeeded) and their bounds.
    """
    k = _N_PARAMS[model]
    m_all = len(setups)
    rows_of, p0, lo, hi, multi = [], [], [], [], []
    for i, su in enumerate(setups):
        if su is None:
            continue
        starts, l, h = su
        l, h = np.asarray(l, float), np.asarray(h, float)
        with np.errstate(invalid="ignore"):
            l_in = np.where(np.isfinite(l), l + 1e-9 * (np.abs(l) + 1), l)
            h_in = np.where(np.isfinite(h), h - 1e-9 * (np.abs(h) + 1), h)
        for s0 in starts:
            rows_of.append(i)
            p0.append(np.clip(np.asarray(s0, float), l_in, h_in))
            lo.append(l)
            hi.append(h)
            multi.append(len(starts) > 1)
    out = np.full((m_all, k), np.nan)
    lo_out, hi_out = np.full((m_all, k), -np.inf), np.full((m_all, k), np.inf)
    settled = np.zeros(m_all, bool)
    if not rows_of:
        return out, lo_out, hi_out, settled
    rows_of, p0, lo, hi, multi = (np.asarray(rows_of), np.asarray(p0), np.asarray(lo), np.asarray(hi),
                                  np.asarray(multi))
    evals = np.where(multi, SCREEN_EVALS, max_evals)
    p, cost, status = _lm_chunked(model, p0, lo, hi, x, y, d, w, evals, rows_of)
    usable = (status >= 0) & np.isfinite(cost) & np.all(np.isfinite(p), axis=1)
    # the best start of each problem
    key = np.where(usable, cost, np.inf)
    order = np.lexsort((key, rows_of))
    first = np.ones(order.size, bool)
    first[1:] = rows_of[order][1:] != rows_of[order][:-1]
    best = order[first]
    best = best[np.isfinite(key[best])]
    again = best[multi[best] & (status[best] == 0)]
    done = status == 1
    if again.size:
        p2, c2, s2 = _lm_chunked(model, p[again], lo[again], hi[again], x, y, d, w,
                                 np.full(again.size, max_evals), rows_of[again])
        keep = (s2 >= 0) & np.isfinite(c2) & (c2 <= cost[again]) & np.all(np.isfinite(p2), axis=1)
        p[again[keep]] = p2[keep]
        done[again] = keep & (s2 == 1)
    out[rows_of[best]] = p[best]
    settled[rows_of[best]] = done[best]
    lo_out[rows_of], hi_out[rows_of] = lo, hi
    return out, lo_out, hi_out, settled


#: A problem is first solved on a window around its field: the starts' centre plus this many of the
#: starts' largest envelope sd (the DoG: the surround's) on each side; then polished on the whole grid.
WINDOW_SDS = 3.5


def _reach(model, starts):
    """Centre (x, y) and the largest envelope sd (degrees) of a problem's starts (internal parameters)."""
    st = np.asarray(starts, float)
    if model == "gaussian":
        sd = np.max(np.abs(st[:, 2:4]))
    elif model == "dog":
        sd = np.max(np.abs(st[:, 3] * st[:, 5])) / np.sqrt(2.0)
    else:
        sd = np.max(np.abs(st[:, 2:4]))
    return float(np.mean(st[:, 0])), float(np.mean(st[:, 1])), float(sd)


def _windows(model, setups, grid):
    """Per problem: (first row, rows, first column, columns) of its window on the grid."""
    ny, nx = grid.shape
    out = np.zeros((len(setups), 4), int)
    out[:] = (0, ny, 0, nx)
    for i, su in enumerate(setups):
        if su is None:
            continue
        x0, y0, sd = _reach(model, su[0])
        if not (np.isfinite(x0) and np.isfinite(y0) and np.isfinite(sd)):
            continue
        row, col = grid.pixel_of(x0, y0)
        hy = int(np.ceil(WINDOW_SDS * sd / grid.dy_deg))
        hx = int(np.ceil(WINDOW_SDS * sd / grid.dx_deg))
        wy = min(ny, 4 * int(np.ceil((2 * hy + 1) / 4)))     # sizes in steps of 4: few window shapes
        wx = min(nx, 4 * int(np.ceil((2 * hx + 1) / 4)))
        r0 = int(np.clip(np.rint(row) - wy // 2, 0, ny - wy))
        c0 = int(np.clip(np.rint(col) - wx // 2, 0, nx - wx))
        out[i] = (r0, wy, c0, wx)
    return out


# --------------------------------------------------------------------------------------------------
# starting points of many problems at once (the same numbers as the one-map functions of spatial.py)
# --------------------------------------------------------------------------------------------------

#: ``scipy.ndimage.label``'s default (4-connected) structure in each plane of a stack, none across planes.
_PLANE_CROSS = np.zeros((3, 3, 3), bool)
_PLANE_CROSS[1] = [[0, 1, 0], [1, 1, 1], [0, 1, 0]]


def _stack(problems):
    """Maps with non-finite pixels zeroed, their finite masks, and the data and weights on the grid."""
    ok = np.array([pr.ok for pr in problems])
    maps = np.where(ok, np.array([pr.map for pr in problems]), 0.0)
    return maps, ok


def _peak_blob(field, threshold):
    """Per plane of ``field`` (m, ny, nx): index of its largest value, and ``field`` kept only above
    ``threshold`` times that value within the 4-connected blob holding it (as the one-map starts)."""
    from scipy import ndimage

    m = field.shape[0]
    flat = field.reshape(m, -1).argmax(axis=1)
    i, j = np.unravel_index(flat, field.shape[1:])
    top = field[np.arange(m), i, j]
    w = np.where(field > threshold * top[:, None, None], field, 0.0)
    lab, _ = ndimage.label(w > 0, structure=_PLANE_CROSS)
    w = np.where(lab == lab[np.arange(m), i, j][:, None, None], w, 0.0)
    return i, j, w


def _blob_starts(problems):
    """:meth:`map2d.fit.spatial._Problem.blob_start` of every problem (one grid), computed together."""
    from scipy import ndimage

    pr0 = problems[0]
    maps, ok = _stack(problems)
    m = len(problems)
    wts = ndimage.gaussian_filter(ok.astype(float), (0, 0.8, 0.8), mode="constant")
    sm = ndimage.gaussian_filter(maps, (0, 0.8, 0.8), mode="constant")
    with np.errstate(invalid="ignore", divide="ignore"):
        sm = np.where(wts > 1e-6, sm / wts, 0.0)
    flat = np.abs(sm).reshape(m, -1).argmax(axis=1)
    i, j = np.unravel_index(flat, sm.shape[1:])
    rows = np.arange(m)
    peak = sm[rows, i, j]
    sign = np.where(peak >= 0, 1.0, -1.0)
    w = np.clip(sign[:, None, None] * sm, 0.0, None)
    w = np.where(w > 0.3 * np.abs(peak)[:, None, None], w, 0.0)
    lab, _ = ndimage.label(w > 0, structure=_PLANE_CROSS)
    w = np.where(lab == lab[rows, i, j][:, None, None], w, 0.0)
    X, Y = pr0.X[None], pr0.Y[None]
    tot = w.sum(axis=(1, 2))
    x0, y0 = pr0.X[i, j].astype(float), pr0.Y[i, j].astype(float)
    s_maj = np.full(m, 1.5 * min(pr0.dx, pr0.dy))
    s_min = s_maj.copy()
    theta = np.zeros(m)
    has = tot > 0
    if has.any():
        wh = w[has]
        mx = (wh * X).sum(axis=(1, 2)) / tot[has]
        my = (wh * Y).sum(axis=(1, 2)) / tot[has]
        cxx = (wh * (X - mx[:, None, None]) ** 2).sum(axis=(1, 2)) / tot[has] + pr0.dx**2 / 12
        cyy = (wh * (Y - my[:, None, None]) ** 2).sum(axis=(1, 2)) / tot[has] + pr0.dy**2 / 12
        cxy = (wh * (X - mx[:, None, None]) * (Y - my[:, None, None])).sum(axis=(1, 2)) / tot[has]
        ev, evec = np.linalg.eigh(np.stack([np.stack([cxx, cxy], -1), np.stack([cxy, cyy], -1)], -2))
        ev = np.clip(ev / 0.55, pr0.wmin**2 * 4, pr0.wmax**2)
        s_min[has], s_maj[has] = np.sqrt(ev[:, 0]), np.sqrt(ev[:, 1])
        theta[has] = np.arctan2(evec[:, 1, 1], evec[:, 0, 1])
        x0[has], y0[has] = mx, my
    raw = np.array([pr.map for pr in problems])[rows, i, j]
    amp = np.where(np.isfinite(raw), raw, peak)
    return [(float(a), float(b), float(c), float(d), float(e), float(f))
            for a, b, c, d, e, f in zip(x0, y0, s_maj, s_min, theta, amp)]


def _spectral_peaks(problems, n_peaks):
    """:meth:`map2d.fit.spatial._Problem.spectral_peaks` of every problem (one grid), computed together."""
    from scipy import ndimage

    pr0 = problems[0]
    maps, ok = _stack(problems)
    mean = np.array([np.mean(pr.d) for pr in problems])
    mc = np.where(ok, maps - mean[:, None, None], 0.0)
    m, ny, nx = mc.shape
    Ny, Nx = max(64, 4 * ny), max(64, 4 * nx)
    # the power of a real map is symmetric, P(-k) = P(k): half the spectrum by the real transform, the
    # other half (columns of negative x-frequency) read from it
    half_cols = Nx // 2 + 1
    P = np.empty((m, Ny, Nx))
    P[:, :, :half_cols] = np.abs(np.fft.rfft2(mc, s=(Ny, Nx))) ** 2
    neg_rows = (-np.arange(Ny)) % Ny
    P[:, :, half_cols:] = P[:, neg_rows, 1:Nx - half_cols + 1][:, :, ::-1]
    fx = np.fft.fftfreq(Nx, d=pr0.dx)
    fr = np.fft.fftfreq(Ny, d=pr0.dy)
    KX, KY = np.meshgrid(fx, -fr)
    # local maxima (3 x 3, periodic) in the half plane kx >= 0: the columns 0 .. Nx/2 and their neighbours
    cols = np.arange(-1, half_cols + 1) % Nx
    Pc = P[:, :, cols]
    mx = ndimage.maximum_filter(Pc, size=(1, 3, 3), mode="wrap")[:, :, 1:-1]
    Pc, KX, KY = Pc[:, :, 1:-1], KX[:, cols[1:-1]], KY[:, cols[1:-1]]
    half = (KX > 0) | ((KX == 0) & (KY > 0))
    c, t = np.nonzero(((Pc == mx) & half[None] & (Pc > 0)).reshape(m, -1))
    val = Pc.reshape(m, -1)[c, t]
    order = np.lexsort((-val, c))                 # by problem, then by power, largest first
    c, t = c[order], t[order]
    start = np.searchsorted(c, np.arange(m))
    end = np.searchsorted(c, np.arange(m), side="right")
    kx, ky = KX.ravel(), KY.ravel()
    out = []
    for i in range(m):
        sel = t[start[i]:min(end[i], start[i] + n_peaks)]
        out.append([(float(kx[u]), float(ky[u])) for u in sel] if sel.size else [(0.5 * pr0.nyq_x * 0.2, 0.0)])
    return out


def _gabor_setups(problems, n_peaks=3):
    """:func:`map2d.fit.spatial._gabor_setup` of every problem (one grid), computed together: the envelope
    from the local energy, the wave vectors from the spectral peaks, amplitudes by linear least squares."""
    from scipy import ndimage

    pr0 = problems[0]
    maps, _ = _stack(problems)
    m = len(problems)
    lo = [pr0.xlo, pr0.ylo, pr0.wmin, pr0.wmin, -pr0.nyq_x, -pr0.nyq_y, -np.inf, -np.inf]
    hi = [pr0.xhi, pr0.yhi, pr0.wmax, pr0.wmax, pr0.nyq_x, pr0.nyq_y, np.inf, np.inf]
    e2 = ndimage.gaussian_filter(maps ** 2, (0, 1.0, 1.0), mode="constant")
    _, _, w = _peak_blob(e2, 0.2)
    X, Y = pr0.X[None], pr0.Y[None]
    with np.errstate(invalid="ignore", divide="ignore"):
        tot = w.sum(axis=(1, 2))
        ex = (w * X).sum(axis=(1, 2)) / tot
        ey = (w * Y).sum(axis=(1, 2)) / tot
        var = 0.5 * ((w * ((X - ex[:, None, None]) ** 2 + (Y - ey[:, None, None]) ** 2)).sum(axis=(1, 2)) / tot)
        s0 = np.clip(np.sqrt(2 * var / 0.6), 2 * pr0.wmin, pr0.wmax / 2)
    peaks = _spectral_peaks(problems, n_peaks)
    # the best (a, b) of every start: least squares on the carrier's cosine and sine under the envelope
    owner, K = [], []
    for c in range(m):
        for kx, ky in peaks[c]:
            if math.hypot(kx, ky) != 0:
                owner.append(c)
                K.append((kx, ky))
    if not owner:
        return [([], lo, hi) for _ in range(m)]
    owner, K = np.array(owner), np.array(K)
    starts = [[] for _ in range(m)]
    for a in range(0, owner.size, 256):
        o, k = owner[a:a + 256], K[a:a + 256]
        dx = pr0.X[None] - ex[o, None, None]
        dy = pr0.Y[None] - ey[o, None, None]
        E = np.exp(-0.5 * (dx * dx + dy * dy) / s0[o, None, None] ** 2)
        ph = 2 * np.pi * (k[:, 0, None, None] * dx + k[:, 1, None, None] * dy)
        wt = _weights_on_grid(problems, o)
        M = np.stack([E * np.cos(ph) * wt, E * np.sin(ph) * wt], axis=-1).reshape(o.size, -1, 2)
        b = (maps[o] * wt).reshape(o.size, -1, 1)
        ab = np.full((o.size, 2), np.nan)
        fin = np.isfinite(M).all(axis=(1, 2)) & np.isfinite(b).all(axis=(1, 2))
        if fin.any():
            ab[fin] = (np.linalg.pinv(M[fin]) @ b[fin])[:, :, 0]
        for row, c in enumerate(o):
            starts[c].append((float(ex[c]), float(ey[c]), float(s0[c]), float(s0[c]), float(k[row, 0]),
                              float(k[row, 1]), float(ab[row, 0]), float(ab[row, 1])))
    return [(st, lo, hi) for st in starts]


def _weights_on_grid(problems, rows):
    """The weights of problems ``rows`` on the grid (0 at the pixels a problem does not use)."""
    out = np.zeros((len(rows),) + problems[0].grid.shape)
    for r, c in enumerate(rows):
        out[r][problems[c].ok] = problems[c].w
    return out


def fit_models(problems, model, intervals=True):
    """Fit ``model`` to every problem (:class:`map2d.fit.spatial._Problem`, one grid) -> list of SpatialFit.

    The same fits as ``map2d.fit.spatial._FITTERS[model]`` (starts, bounds, reported parameters, criteria,
    intervals), the optimiser batched (module notes): every start of every problem first on a window
    around its field (problems grouped by window shape), then the chosen solution polished on the whole
    grid (the objective of the reference). ``intervals=False``: no Wald intervals (NaN), for a caller that
    uses the parameters only.
    """
    return _ModelFits(problems, model, intervals=intervals).fits


#: Evaluations of a run to convergence (on a window, the whole grid, or the polish) when the fits of
#: several models are compared (:func:`fit_choosing`): a row that needs more is continued only if its model
#: can be the one reported.
SETTLE_EVALS = 20


class _ModelFits:
    """One model fitted to many problems, with what is needed to continue some of them later.

    ``cap``: evaluations of each run to convergence (None: the reference's budgets). ``settled[i]``: the
    fit of problem ``i`` met a stopping test (else it ran out of its ``cap``); ``fits``: SpatialFit each.
    """

    def __init__(self, problems, model, cap=None, intervals=True):
        from . import spatial as S

        self.model = model
        self.intervals = intervals
        self.setup, self.report, self.fun = {
            "gaussian": (S._gauss_setup, S._gauss_report, S._gauss_model),
            "dog": (S._dog_setup, S._dog_report, S.dog2d),
            "gabor": (S._gabor_setup, S._gabor_report, S.gabor2d),
        }[model]
        k = self.k = _N_PARAMS[model]
        problems = self.problems = list(problems)
        m = len(problems)
        self.settled = np.ones(m, bool)
        self.fits = []
        if not problems:
            return
        grid = problems[0].grid
        ny, nx = grid.shape
        self.xs, self.ys = xs, ys = np.asarray(grid.x_deg, float), np.asarray(grid.y_deg, float)
        enough = [i for i, pr in enumerate(problems) if S._enough(pr, k)]
        made = {}
        if model == "gabor":
            made = dict(zip(enough, _gabor_setups([problems[i] for i in enough]))) if enough else {}
        else:        # the blob starts of all problems at once, kept on the problems (the Gaussian's and DoG's)
            todo = [problems[i] for i in enough if getattr(problems[i], "blob", None) is None]
            for pr, b in zip(todo, _blob_starts(todo) if todo else []):
                pr.blob = b
            made = {i: self.setup(problems[i]) for i in enough}
        setups = []
        for i in range(len(problems)):
            su = made.get(i)
            setups.append(su if su is not None and len(su[0]) else None)
        D = self.D = np.zeros((m, ny, nx))
        W = self.W = np.zeros((m, ny, nx))
        for i, pr in enumerate(problems):
            D[i][pr.ok] = pr.d
            W[i][pr.ok] = pr.w
        win = _windows(model, setups, grid)
        p_int = self.p_int = np.full((m, k), np.nan)
        lo, hi = self.lo, self.hi = np.full((m, k), -np.inf), np.full((m, k), np.inf)
        full_evals = MAX_EVALS if cap is None else cap
        window_evals = WINDOW_EVALS if cap is None else min(cap, WINDOW_EVALS)
        for shape in sorted({(int(a), int(b)) for a, b in win[:, [1, 3]]}):
            sel = np.flatnonzero((win[:, 1] == shape[0]) & (win[:, 3] == shape[1]))
            sel = np.array([i for i in sel if setups[i] is not None], int)
            if sel.size == 0:
                continue
            rr = win[sel, 0, None] + np.arange(shape[0])             # (s, wy)
            cc = win[sel, 2, None] + np.arange(shape[1])             # (s, wx)
            d = D[sel[:, None, None], rr[:, :, None], cc[:, None, :]]
            w = W[sel[:, None, None], rr[:, :, None], cc[:, None, :]]
            full = shape == (ny, nx)
            out, l, h, done = _solve_many(model, [setups[i] for i in sel], xs[cc][:, None, :], ys[rr][:, :, None],
                                          d, w, full_evals if full else window_evals)
            p_int[sel], lo[sel], hi[sel] = out, l, h
            if full:
                self.settled[sel] = done
        # polish on the whole grid what was solved on a smaller window
        part = np.flatnonzero(np.all(np.isfinite(p_int), axis=1) & ((win[:, 1] < ny) | (win[:, 3] < nx)))
        self._polish(part, full_evals)
        self.fits = [None] * m
        self._report(np.arange(m))

    def _polish(self, part, evals):
        """Run the problems ``part`` to convergence on the whole grid (``evals`` evaluations at most)."""
        if part.size == 0:
            return
        xs, ys = self.xs, self.ys
        p2, c2, s2 = _lm_chunked(self.model, self.p_int[part], self.lo[part], self.hi[part], xs[None, None, :],
                                 ys[None, :, None], self.D, self.W, np.full(part.size, evals), part)
        ok = (s2 >= 0) & np.all(np.isfinite(p2), axis=1)
        self.p_int[part[ok]] = p2[ok]
        self.settled[part] = s2 != 0

    def refine(self, rows):
        """Continue the problems ``rows`` to convergence with the reference's budget; their fits again."""
        rows = np.asarray([i for i in rows if not self.settled[i]], int)
        part = rows[np.all(np.isfinite(self.p_int[rows]), axis=1)] if rows.size else rows
        self._polish(part, MAX_EVALS)
        self.settled[rows] = True
        self._report(part)

    def _report(self, rows):
        """The SpatialFit of the problems ``rows`` from their internal parameters."""
        from . import spatial as S

        model, k, fun = self.model, self.k, self.fun
        problems = self.problems
        done = np.asarray([i for i in rows if np.all(np.isfinite(self.p_int[i]))], int)
        for i in set(np.asarray(rows).tolist()) - set(done.tolist()):
            self.fits[i] = S._empty_fit(model, problems[i])
        if done.size == 0:
            return
        p_rep = np.array([self.report(self.p_int[i]) for i in done])
        X, Y = self.xs[None, None, :], self.ys[None, :, None]
        if self.intervals:
            cov, wald = _covariances(fun, p_rep, X, Y, self.D[done], self.W[done], [problems[i] for i in done])
        else:
            cov = wald = np.full((done.size, k, k), np.nan)
        pred = fun(X, Y, *[p_rep[:, j, None, None] for j in range(k)])
        names = S._PARAM_NAMES[model]
        for row, i in enumerate(done):
            pr = problems[i]
            aic, bic = pr.criteria(pred[row][pr.ok], k)
            self.fits[i] = S.SpatialFit(model=model, params={nm: float(v) for nm, v in zip(names, p_rep[row])},
                                        ci=S._intervals(names, p_rep[row], cov[row]), aic={model: aic},
                                        bic={model: bic}, r2=pr.r2(pred[row][pr.ok]), predicted=pred[row],
                                        criterion="none", n_pixels=pr.n,
                                        ci_equal_noise=S._centre_intervals(names, p_rep[row], wald[row]))


def fit_choosing(problems, models, needed):
    """Every model of ``models`` fitted to every problem, run to convergence only where it can matter.

    Each model's fits first get :data:`SETTLE_EVALS` evaluations per run to convergence. ``needed(fits)``
    (``fits``: ``{model: [SpatialFit, ...]}``) names, per model, the problems whose fit may be reported
    or may change which fit is (the chosen model and those ranked near it); those that ran out of
    evaluations are continued with the reference's budget and fitted again, until every fit named is
    converged. A fit that is never named keeps its criterion from the shorter run (a model that lost by
    a margin). Returns ``{model: [SpatialFit, ...]}``.
    """
    state = {m: _ModelFits(problems, m, cap=SETTLE_EVALS) for m in models}
    while True:
        fits = {m: state[m].fits for m in models}
        todo = {m: [i for i in rows if not state[m].settled[i]] for m, rows in needed(fits).items()}
        if not any(todo.values()):
            return fits
        for m, rows in todo.items():
            if rows:
                state[m].refine(rows)


def _covariances(fun, p, x, y, d, w, problems):
    """Covariances of the reported parameters ``p`` (m, k), as ``_Problem.covariance`` row by row:
    central differences of ``fun`` (step ``1e-6 (|p| + 1)``) on the grid ``x`` (1, 1, nx), ``y`` (1, ny, 1),
    weighted by ``w``, and the HC3 sandwich of ``map2d.fit.spatial._sandwich_cov``; returns them and the
    Wald covariances."""
    m, k = p.shape
    out = np.full((m, k, k), np.nan)
    out_wald = np.full((m, k, k), np.nan)
    P = d.shape[1] * d.shape[2]
    size = max(1, int(CHUNK_BYTES // (8 * P * (3 * k + 4))))
    for a in range(0, m, size):
        b = min(m, a + size)
        pc = p[a:b]
        wc = w[a:b]
        J = np.empty((b - a, k) + d.shape[1:])
        for i in range(k):
            h = 1e-6 * (np.abs(pc[:, i]) + 1.0)
            pp, pm = pc.copy(), pc.copy()
            pp[:, i] += h
            pm[:, i] -= h
            fp = fun(x, y, *[pp[:, j, None, None] for j in range(k)])
            fm = fun(x, y, *[pm[:, j, None, None] for j in range(k)])
            J[:, i] = (fp - fm) / (2 * h[:, None, None]) * wc
        r = (fun(x, y, *[pc[:, j, None, None] for j in range(k)]) - d[a:b]) * wc
        rss = _sumsq(r)
        s2 = np.empty(b - a)
        for row in range(b - a):
            pr = problems[a + row]
            red = rss[row] / max(pr.n - k, 1)
            s2[row] = max(1.0, red) if pr.known_noise else red
        out[a:b], out_wald[a:b] = _sandwich_covs(J.reshape(b - a, k, P), r.reshape(b - a, P), s2)
    return out, out_wald


def _normal_pinvs(A):
    """``map2d.fit.spatial._normal_pinv`` of every row of ``A`` (m, k, k) -> ``inv`` (m, k, k), ``unknown``
    (m, k): the rows whose parameters all have a non-zero column in one stacked eigen-decomposition, the
    others one by one."""
    from . import spatial as S

    m, k = A.shape[:2]
    inv = np.zeros((m, k, k))
    unknown = np.zeros((m, k), bool)
    c = np.sqrt(np.einsum("ijj->ij", A))
    fast = np.isfinite(A).all(axis=(1, 2)) & (c > 0).all(axis=1)
    for i in np.flatnonzero(~fast):
        inv[i], unknown[i] = S._normal_pinv(A[i])
    if fast.any():
        cf = c[fast]
        outer = cf[:, :, None] * cf[:, None, :]
        w, V = np.linalg.eigh(A[fast] / outer)
        null = w <= 1e-9 * np.maximum(w.max(axis=1, keepdims=True), 1e-300)
        inv_w = np.where(null, 0.0, 1.0 / np.where(null, 1.0, w))
        inv[fast] = (V * inv_w[:, None, :]) @ V.transpose(0, 2, 1) / outer
        # a parameter with a real share in an unidentified direction has no finite interval
        unknown[fast] = (np.where(null[:, None, :], V ** 2, 0.0).sum(axis=2) > 1e-6) & null.any(axis=1, keepdims=True)
    return inv, unknown


def _nan_unknown(cov, unknown):
    return np.where(unknown[:, :, None] | unknown[:, None, :], np.nan, cov)


def _wald_covs(A, s2):
    """``map2d.fit.spatial._wald_cov`` of every row of ``A`` (m, k, k), ``s2`` (m,)."""
    inv, unknown = _normal_pinvs(A)
    return _nan_unknown(s2[:, None, None] * inv, unknown)


def _sandwich_covs(J, r, s2):
    """``map2d.fit.spatial._sandwich_cov`` of every row: weighted Jacobians ``J`` (m, k, n), weighted
    residuals ``r`` (m, n), Wald variances' factors ``s2`` (m,) -> (sandwich, Wald) covariances."""
    from . import spatial as S

    inv, unknown = _normal_pinvs(J @ J.transpose(0, 2, 1))
    h = np.einsum("mkn,mkn->mn", J, inv @ J)
    e = (r / np.maximum(1.0 - h, 1.0 - S.MAX_LEVERAGE)) ** 2
    cov = inv @ ((J * e[:, None, :]) @ J.transpose(0, 2, 1)) @ inv
    wald = s2[:, None, None] * inv
    return _nan_unknown(S._floored(cov, wald), unknown), _nan_unknown(wald, unknown)
