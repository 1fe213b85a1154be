"""Compiled inner loops of the map's modal path, with a pure-numpy fallback.

Two kernels, used by :mod:`loopcheck.design.maps`:

- :func:`modal_response`: ``G(z) = sum_k r_k / (z - mu_k)`` for many lines
  and many points (the frequency response of a rank-one gain line in modal
  form);
- :func:`follow_roots`: every closed-loop root of each line followed along a
  grid of gains in the product form ``f(z) = prod_k (z - mu_k) (1 - t
  sum_k r_k/(z - mu_k))`` by a predictor and Newton steps, checked against
  the traces ``sum z_i = trace A`` and ``sum z_i^2 = trace A^2``; where a
  check fails the caller re-seeds the roots from eigenvalues.

With numba installed (a dependency where numba has wheels) the loops are
compiled on first use and cached on disk; without it, or with the environment variable
``LOOPCHECK_NUMBA=0``, the same computation runs vectorised in numpy (slower
for large maps, same results to rounding). :data:`BACKEND` names the one in
use.

Newton's method on polynomial roots, Lagrange extrapolation as predictor and
the trace identities (Newton's identities for the first two power sums) are
common practice.
"""

from __future__ import annotations

import os

import numpy as np

#: Newton correction (relative to 1 + |z|) below which a root counts as
#: converged; the error left after such a step is about its square over
#: the distance to the nearest other root.
NEWTON_TOL = 1e-8
#: Newton steps per grid value before a line counts as failed there.
NEWTON_MAX = 6
#: Relative tolerance of the trace checks.
TRACE_TOL = 1e-9


def _numba_jit():
    if os.environ.get("LOOPCHECK_NUMBA", "1").strip().lower() in ("0", "no", "false", "off"):
        return None
    try:
        import numba
    except Exception:  # not installed, or broken: the numpy path
        return None
    return numba


_NUMBA = _numba_jit()
_JIT = None if _NUMBA is None else _NUMBA.njit(cache=True, nogil=True, error_model="numpy")
_PJIT = None if _NUMBA is None else _NUMBA.njit(cache=True, nogil=True, error_model="numpy", parallel=True)
_prange = range if _NUMBA is None else _NUMBA.prange
#: "numba" when the compiled kernels are in use, else "numpy".
BACKEND = "numba" if _JIT is not None else "numpy"


# ---------------------------------------------------------------------------
# numpy versions (the fallback, and the reference of the compiled ones)
# ---------------------------------------------------------------------------


def _response_numpy(mu, r, z):
    out = np.zeros(z.shape, dtype=complex)
    with np.errstate(all="ignore"):
        for k in range(mu.shape[1]):
            out += r[:, k : k + 1] / (z - mu[:, k : k + 1])
    return out


def _newton_numpy(z, mu, r, t):
    S0 = np.zeros(z.shape, dtype=complex)
    S1 = np.zeros(z.shape, dtype=complex)
    S2 = np.zeros(z.shape, dtype=complex)
    for k in range(mu.shape[1]):
        inv = 1.0 / (z - mu[:, k : k + 1])
        S0 += inv
        q = r[:, k : k + 1] * inv
        S1 += q
        q *= inv
        S2 += q
    F = 1.0 - t * S1
    dz = F / (F * S0 + t * S2)
    # a root exactly on a pole is a root when t = 0 (no correction); else fail
    hit = ~np.isfinite(dz)
    dz[hit & (t == 0.0)] = 0.0
    return z - dz, dz


def _lagrange_weights(y, j: int, p: int) -> list[float]:
    """Weights of the last p values (newest first) extrapolating to y[j]."""
    out = []
    for a in range(p):
        w = 1.0
        for b in range(p):
            if b != a:
                w *= (y[j] - y[j - 1 - b]) / (y[j - 1 - a] - y[j - 1 - b])
        out.append(w)
    return out


def _follow_numpy(mu, r, base, y, seeds, start, out):
    S, n = mu.shape
    ny = y.size
    fail = np.full(S, -1)
    e1_0, e1_1 = mu.sum(axis=1), r.sum(axis=1)
    e2_0, e2_1, e2_2 = (mu * mu).sum(axis=1), 2.0 * (mu * r).sum(axis=1), e1_1 * e1_1
    j0 = int(start.min()) if S else 0
    alive = np.zeros(S, dtype=bool)
    hist = [seeds.astype(complex).copy() for _ in range(4)]  # newest first
    age = np.zeros(S, dtype=int)
    with np.errstate(all="ignore"):
        for j in range(j0, ny):
            begin = start == j
            if begin.any():
                for h in hist:
                    h[begin] = seeds[begin]
                age[begin] = 1
                alive |= begin
                out[j, begin] = np.abs(seeds[begin]).max(axis=1)
            act = np.nonzero(alive & (start < j))[0]
            if act.size == 0:
                continue
            full = act.size == S
            yy = y[j]
            t = (yy - base[act])[:, None]
            a = age if full else age[act]
            H = hist if full else [h[act] for h in hist]
            zp = H[0].copy()
            for p in (2, 3, 4):
                if j - p < 0:
                    break
                sel = a >= p
                if not sel.any():
                    break
                wts = _lagrange_weights(y, j, p)
                pred = wts[0] * H[0]
                for q in range(1, p):
                    pred += wts[q] * H[q]
                zp = np.where(sel[:, None], pred, zp)
            zz = zp
            m_act, r_act = (mu, r) if full else (mu[act], r[act])
            zz, dz = _newton_numpy(zz, m_act, r_act, t)
            done = (np.abs(dz) <= NEWTON_TOL * (1.0 + np.abs(zz))).all(axis=1)
            todo = np.nonzero(~done)[0]
            for _ in range(NEWTON_MAX - 1):
                if todo.size == 0:
                    break
                znew, dk = _newton_numpy(zz[todo], m_act[todo], r_act[todo], t[todo])
                zz[todo] = znew
                ok_k = (np.abs(dk) <= NEWTON_TOL * (1.0 + np.abs(znew))).all(axis=1)
                todo = todo[~ok_k]
            ok = np.ones(act.size, dtype=bool)
            ok[todo] = False
            tt = t[:, 0]
            mag = np.abs(zz).sum(axis=1)
            e1 = e1_0[act] + tt * e1_1[act]
            e2 = e2_0[act] + tt * e2_1[act] + tt * tt * e2_2[act]
            ok &= np.abs(zz.sum(axis=1) - e1) <= TRACE_TOL * (1.0 + mag)
            ok &= np.abs((zz * zz).sum(axis=1) - e2) <= TRACE_TOL * (1.0 + mag * mag)
            bad = act[~ok]
            fail[bad] = j
            alive[bad] = False
            good = act[ok]
            hist = [hist[3], hist[0], hist[1], hist[2]]  # the oldest slot becomes the newest
            hist[0][good] = zz[ok]
            age[good] += 1
            out[j, good] = np.abs(zz[ok]).max(axis=1)
    return fail


# ---------------------------------------------------------------------------
# compiled versions
# ---------------------------------------------------------------------------

if _JIT is not None:

    @_JIT
    def _response_numba(mur, mui, rr, ri, zr, zi):  # pragma: no cover - compiled
        S, F = zr.shape
        n = mur.shape[1]
        out = np.empty((S, F), dtype=np.complex128)
        for i in range(S):
            for f in range(F):
                ar = 0.0
                ai = 0.0
                for k in range(n):
                    dr = zr[i, f] - mur[i, k]
                    di = zi[i, f] - mui[i, k]
                    den = dr * dr + di * di
                    if den == 0.0:
                        ar = np.nan
                        ai = np.nan
                        break
                    ir = dr / den
                    ii = -di / den
                    ar += rr[i, k] * ir - ri[i, k] * ii
                    ai += rr[i, k] * ii + ri[i, k] * ir
                out[i, f] = complex(ar, ai)
        return out

    @_JIT
    def _blocks_numba(co, zr, zi):  # pragma: no cover - compiled
        S, F = zr.shape
        nb = co.shape[2]
        out = np.empty((S, F), dtype=np.complex128)
        for i in range(S):
            dsum = 0.0
            for j in range(nb):
                dsum += co[i, 4, j]
            for f in range(F):
                z = complex(zr[i, f], zi[i, f])
                acc = complex(dsum, 0.0)
                for j in range(nb):
                    den = (z + co[i, 2, j]) * z + co[i, 3, j]
                    if den.real == 0.0 and den.imag == 0.0:
                        acc = complex(np.inf, np.nan)
                        break
                    acc += (co[i, 0, j] * z + co[i, 1, j]) / den
                out[i, f] = acc
        return out

    @_PJIT
    def _imag_ratio_numba(mur, mui, rr, ri, w):  # pragma: no cover - compiled
        S, F = w.shape
        n = mur.shape[1]
        out = np.empty((S, F))
        for i in _prange(S):
            for f in range(F):
                zr = np.cos(w[i, f])
                zi = np.sin(w[i, f])
                ar = 0.0
                ai = 0.0
                for k in range(n):
                    dr = zr - mur[i, k]
                    di = zi - mui[i, k]
                    den = dr * dr + di * di
                    if den == 0.0:
                        ar = np.nan
                        ai = np.nan
                        break
                    inv = 1.0 / den
                    ir = dr * inv
                    ii = -di * inv
                    ar += rr[i, k] * ir - ri[i, k] * ii
                    ai += rr[i, k] * ii + ri[i, k] * ir
                out[i, f] = ai / np.sqrt(ar * ar + ai * ai)
        return out

    @_PJIT
    def _follow_numba(mur, mui, rr, ri, base, y, seeds, start, pair, out):  # pragma: no cover - compiled
        S, n = mur.shape
        ny = y.shape[0]
        fail = np.full(S, -1, dtype=np.int64)
        for i in _prange(S):
            z = np.empty(n, dtype=np.complex128)
            hist = np.empty((4, n), dtype=np.complex128)
            wts = np.empty(4)
            e1_0 = 0j
            e1_1 = 0j
            e2_0 = 0j
            e2_1 = 0j
            for k in range(n):
                m_k = complex(mur[i, k], mui[i, k])
                r_k = complex(rr[i, k], ri[i, k])
                e1_0 += m_k
                e1_1 += r_k
                e2_0 += m_k * m_k
                e2_1 += 2.0 * m_k * r_k
            e2_2 = e1_1 * e1_1
            j0 = start[i]
            rad = 0.0
            for q in range(n):
                z[q] = seeds[i, q]
                hist[0, q] = z[q]
                rad = max(rad, abs(z[q]))
            out[j0, i] = rad
            age = 1
            for j in range(j0 + 1, ny):
                yy = y[j]
                t = yy - base[i]
                # Lagrange extrapolation through the last min(age, 4) values
                p = min(age, 4)
                for a in range(p):
                    w = 1.0
                    for b in range(p):
                        if b != a:
                            w *= (yy - y[j - 1 - b]) / (y[j - 1 - a] - y[j - 1 - b])
                    wts[a] = w
                for q in range(n):
                    acc = 0j
                    for a in range(p):
                        acc += wts[a] * hist[a, q]
                    z[q] = acc
                ok = True
                q = 0
                while q < n:
                    zr = z[q].real
                    zi = z[q].imag
                    conv = False
                    for _ in range(NEWTON_MAX):
                        s0r = 0.0
                        s0i = 0.0
                        s1r = 0.0
                        s1i = 0.0
                        s2r = 0.0
                        s2i = 0.0
                        on_pole = False
                        for k in range(n):
                            dr = zr - mur[i, k]
                            di = zi - mui[i, k]
                            den = dr * dr + di * di
                            if den == 0.0:
                                on_pole = True
                                break
                            inv = 1.0 / den
                            ir = dr * inv
                            ii = -di * inv
                            s0r += ir
                            s0i += ii
                            qr = rr[i, k] * ir - ri[i, k] * ii
                            qi = rr[i, k] * ii + ri[i, k] * ir
                            s1r += qr
                            s1i += qi
                            s2r += qr * ir - qi * ii
                            s2i += qr * ii + qi * ir
                        if on_pole:
                            # a root exactly on a pole is a root when t = 0
                            if t == 0.0:
                                conv = True
                            break
                        F = complex(1.0 - t * s1r, -t * s1i)
                        den2 = F * complex(s0r, s0i) + t * complex(s2r, s2i)
                        if den2.real == 0.0 and den2.imag == 0.0:
                            break
                        dz = F / den2
                        if not (np.isfinite(dz.real) and np.isfinite(dz.imag)):
                            break
                        zr -= dz.real
                        zi -= dz.imag
                        if abs(dz) <= NEWTON_TOL * (1.0 + abs(complex(zr, zi))):
                            conv = True
                            break
                    if not conv:
                        ok = False
                        break
                    z[q] = complex(zr, zi)
                    if pair[i, q]:
                        # the conjugate partner of a complex root (real matrix)
                        if zi <= 0.0:
                            ok = False  # the pair reached the real axis: re-seed
                            break
                        z[q + 1] = complex(zr, -zi)
                        q += 2
                    else:
                        q += 1
                if ok:
                    s1 = 0j
                    s2 = 0j
                    mag = 0.0
                    for q in range(n):
                        s1 += z[q]
                        s2 += z[q] * z[q]
                        mag += abs(z[q])
                    e1 = e1_0 + t * e1_1
                    e2 = e2_0 + t * e2_1 + t * t * e2_2
                    if abs(s1 - e1) > TRACE_TOL * (1.0 + mag) or abs(s2 - e2) > TRACE_TOL * (1.0 + mag * mag):
                        ok = False
                if not ok:
                    fail[i] = j
                    break
                rad = 0.0
                for q in range(n):
                    hist[3, q] = hist[2, q]
                    hist[2, q] = hist[1, q]
                    hist[1, q] = hist[0, q]
                    hist[0, q] = z[q]
                    rad = max(rad, abs(z[q]))
                out[j, i] = rad
                age += 1
        return fail


# ---------------------------------------------------------------------------
# entry points
# ---------------------------------------------------------------------------


def modal_response(mu: np.ndarray, r: np.ndarray, z: np.ndarray) -> np.ndarray:
    """``G(z) = sum_k r_k / (z - mu_k)`` for lines ``mu, r [S, n]`` (complex)
    at points ``z [S, F]`` (complex); infinite or NaN at a pole."""
    if _JIT is not None:
        z = np.asarray(z, dtype=complex)
        mu, r = np.asarray(mu, dtype=complex), np.asarray(r, dtype=complex)
        parts = [np.ascontiguousarray(a) for a in (mu.real, mu.imag, r.real, r.imag)]
        zr, zi = np.broadcast_arrays(z.real, z.imag)
        return _response_numba(*parts, np.ascontiguousarray(zr), np.ascontiguousarray(zi))
    return _response_numpy(mu, r, z)


def block_sum(co: np.ndarray, z: np.ndarray) -> np.ndarray:
    """``sum_j (n1_j z + n0_j) / (z^2 + a1_j z + a0_j) + d_j`` for points
    ``z [S, F]`` with per-point block coefficients ``co [S, 5, blocks]``
    (rows n1, n0, a1, a0, d): the response of controller blocks of order
    <= 2, each from its own realisation."""
    if _JIT is not None:
        z = np.asarray(z, dtype=complex)
        zr, zi = np.broadcast_arrays(z.real, z.imag)
        return _blocks_numba(np.ascontiguousarray(co, dtype=float), np.ascontiguousarray(zr), np.ascontiguousarray(zi))
    c = co[:, None, :, :]
    zz = z[:, :, None]
    with np.errstate(all="ignore"):
        terms = (c[..., 0, :] * zz + c[..., 1, :]) / ((zz + c[..., 2, :]) * zz + c[..., 3, :])
    return terms.sum(axis=-1) + c[..., 4, :].sum(axis=-1)


def imag_ratio(mu: np.ndarray, r: np.ndarray, w: np.ndarray) -> np.ndarray:
    """``Im G / |G|`` of :func:`modal_response` on the unit circle,
    ``z = e^{jw}`` for angles ``w [S, F]`` [rad/sample]; NaN at a pole or a
    zero of G."""
    if _JIT is not None:
        mu, r = np.asarray(mu, dtype=complex), np.asarray(r, dtype=complex)
        parts = [np.ascontiguousarray(a) for a in (mu.real, mu.imag, r.real, r.imag)]
        with np.errstate(all="ignore"):
            return _imag_ratio_numba(*parts, np.ascontiguousarray(w, dtype=float))
    g = _response_numpy(mu, r, np.exp(1j * w))
    with np.errstate(all="ignore"):
        return g.imag / np.abs(g)


def conjugate_pairs(z: np.ndarray) -> np.ndarray:
    """``[S, n]`` flags of the roots ``z [S, n]`` of real lines that are the
    first of an adjacent conjugate pair (positive imaginary part first, as
    LAPACK returns eigenvalues of real matrices)."""
    pair = np.zeros(z.shape, dtype=bool)
    if z.shape[1] > 1:
        pair[:, :-1] = (z[:, :-1].imag > 0) & (z[:, 1:] == np.conj(z[:, :-1]))
        # a flagged root's partner must not itself start a pair
        for q in range(1, z.shape[1]):
            pair[:, q] &= ~pair[:, q - 1]
    return pair


def follow_roots(mu, r, base, y, seeds, start, out) -> np.ndarray:
    """Follow every root of each line from grid index ``start[i]`` (roots
    ``seeds[i]`` there) up the grid ``y [ny]`` (ascending), writing the
    largest root modulus into ``out[j, i]`` (``out [ny, S]``, float).

    Lines ``mu, r [S, n]`` (complex) in the product form of the module
    docstring around the base gains ``base [S]``. Returns ``fail [S]``: the
    grid index where a line's Newton steps did not converge or its trace
    check failed (``out`` is filled below it; the caller re-seeds there),
    or -1 where the line reached the end of the grid."""
    args = (
        np.ascontiguousarray(mu, dtype=complex),
        np.ascontiguousarray(r, dtype=complex),
        np.ascontiguousarray(base, dtype=float),
        np.ascontiguousarray(y, dtype=float),
        np.ascontiguousarray(seeds, dtype=complex),
        np.ascontiguousarray(start, dtype=np.int64),
    )
    if _JIT is not None:
        mu, r = args[0], args[1]
        parts = [np.ascontiguousarray(a) for a in (mu.real, mu.imag, r.real, r.imag)]
        # conjugate pairs are followed once (the closed loop is real)
        pair = conjugate_pairs(args[4])
        return _follow_numba(*parts, *args[2:], pair, out)
    return _follow_numpy(*args, out)
