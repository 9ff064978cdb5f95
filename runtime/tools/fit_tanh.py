#!/usr/bin/env python3
"""Derive the coefficients of `math::tanh` (runtime/src/math.rs).

The runtime evaluates, for |x| <= 9 (beyond, tanh rounds to +-1 in f32):

    y = x^2
    u = x + (x y) N(y) / D(y)          # u = 2 tanh(x / 2)
    t = u / (1 + (u / 4) u)            # tanh x = 2T / (1 + T^2), T = u / 2

N has degree 2 and D degree 2 with leading coefficient 1. The half angle
T = tanh(s), s = x / 2, is written s + s^3 R(s^2) so that the rational part
only carries the small correction tanh(s) - s; the last step damps any error
of T by (1 - T^2) / (1 + T^2), which is what keeps the result within two f32
ulp of 1 where tanh saturates.

The fit: R(v) = (tanh(sqrt v) / sqrt v - 1) / v on v = s^2 in [0, 4.5^2] by
a rational N/D, minimising the maximum of the error it causes in t relative
to tanh(x), i.e. weight 1 / (s^3 dt/dT) times t. Linearised weighted least
squares in a Chebyshev basis, iterated: the Sanathanan-Koerner step divides
the linear residual N - R D by the previous D, Lawson's update multiplies the
weights by the error (both common practice for rational minimax fits). D's
coefficients are then rounded to f32 and N refitted (linear, Lawson) with D
fixed, then rounded too. Finally the f32 program above is simulated with
numpy float32 element-wise operations (IEEE-754 correctly rounded, no fused
multiply-add, the same operations in the same order as the runtime) against
f64 tanh at the runtime test's 2,000,001 points over [-12, 12].

Usage: python3 runtime/tools/fit_tanh.py     (numpy only)
"""
import numpy as np
from numpy.polynomial import chebyshev as cheb
from numpy.polynomial import polynomial as poly

SATURATION = 9.0  # tanh(9.0000005) rounds to 1.0 in f32
N_DEG, D_DEG = 2, 2
HALF = SATURATION / 2


def nodes(n=8000):
    """Chebyshev-spaced s in (0, HALF], dense at both ends."""
    k = np.arange(n)
    s = 0.5 * HALF * (1.0 - np.cos(np.pi * (k + 0.5) / n))
    return np.concatenate([s, [HALF]])


def target(s):
    """R(s^2) = (tanh s / s - 1) / s^2, by its Taylor series for tiny s."""
    v = s * s
    out = np.empty_like(s)
    big = s > 1e-2
    out[big] = (np.tanh(s[big]) / s[big] - 1.0) / v[big]
    w = v[~big]
    out[~big] = -1.0 / 3.0 + 2.0 * w / 15.0 - 17.0 * w * w / 315.0
    return out


def error_scale(s):
    """t-relative error caused by a unit error of R at s: s^3 (dt/dT) / t."""
    big_t = np.tanh(s)
    dt_dT = 2.0 * (1.0 - big_t**2) / (1.0 + big_t**2) ** 2
    return s**3 * dt_dT / np.tanh(2.0 * s)


def basis(v, lo, hi, deg):
    z = 2.0 * (v - lo) / (hi - lo) - 1.0
    return np.array([cheb.chebval(z, np.eye(deg + 1)[i]) for i in range(deg + 1)]).T


def to_monomial(c, lo, hi):
    """Chebyshev coefficients in z = 2 (v - lo) / (hi - lo) - 1 -> powers of v."""
    p = cheb.cheb2poly(c)
    lin = [-2.0 * lo / (hi - lo) - 1.0, 2.0 / (hi - lo)]
    out = np.zeros(1)
    for i, ci in enumerate(p):
        out = poly.polyadd(out, ci * poly.polypow(lin, i))
    return out


def rational_fit(v, r, scale, iters=150):
    """Minimax-weighted N/D (D monic in v) by Sanathanan-Koerner + Lawson."""
    lo, hi = v.min(), v.max()
    bn, bd = basis(v, lo, hi, N_DEG), basis(v, lo, hi, D_DEG)
    lead = to_monomial(np.eye(D_DEG + 1)[D_DEG], lo, hi)[D_DEG]
    w = np.ones_like(v)
    d_prev = np.ones_like(v)
    best = (np.inf, None, None)
    for _ in range(iters):
        # unknowns: N's coefficients, D's except the leading (held at 1/lead)
        a = np.hstack([bn, -r[:, None] * bd[:, :D_DEG]]) * (scale / d_prev)[:, None]
        rhs = r * bd[:, D_DEG] / lead * scale / d_prev
        sw = np.sqrt(w)
        sol, *_ = np.linalg.lstsq(a * sw[:, None], rhs * sw, rcond=None)
        n_c = sol[: N_DEG + 1]
        d_c = np.concatenate([sol[N_DEG + 1 :], [1.0 / lead]])
        d_val = bd @ d_c
        err = (bn @ n_c / d_val - r) * scale
        if np.abs(err).max() < best[0]:
            best = (np.abs(err).max(), to_monomial(n_c, lo, hi), to_monomial(d_c, lo, hi))
        d_prev = d_val
        w = np.maximum(w * np.abs(err) / np.sum(w * np.abs(err)), 1e-300)
    return best


def refit_numerator(v, r, scale, d, iters=150):
    """N with D fixed: linear weighted minimax by Lawson's iteration."""
    lo, hi = v.min(), v.max()
    bn = basis(v, lo, hi, N_DEG)
    d_val = poly.polyval(v, d)
    a = bn * (scale / d_val)[:, None]
    rhs = r * scale
    w = np.ones_like(v)
    best = (np.inf, None)
    for _ in range(iters):
        sw = np.sqrt(w)
        c, *_ = np.linalg.lstsq(a * sw[:, None], rhs * sw, rcond=None)
        err = a @ c - rhs
        if np.abs(err).max() < best[0]:
            best = (np.abs(err).max(), to_monomial(c, lo, hi))
        w = np.maximum(w * np.abs(err) / np.sum(w * np.abs(err)), 1e-300)
    return best


def in_x_squared(n, d):
    """R(s^2) s^3 = (x y) R(y / 4) / 8 and u = 2 T: N~(y) / D~(y) = R(y / 4) / 4,
    made monic again; every factor is a power of two (exact in f32)."""
    n = np.array([c * 4.0**-i for i, c in enumerate(n)]) / 4.0
    d = np.array([c * 4.0**-j for j, c in enumerate(d)])
    return n / d[-1], d / d[-1]


def tanh_f32(x, n, d):
    """The runtime's program, operation for operation, in float32."""
    x = np.asarray(x, dtype=np.float32)
    y = x * x
    num = np.full_like(x, n[-1])
    for c in n[-2::-1]:
        num = c + y * num
    den = y + d[-2]
    for c in d[-3::-1]:
        den = c + y * den
    u = x + (x * y) * (num / den)
    t = u / (np.float32(1.0) + (u * np.float32(0.25)) * u)
    lim = np.float32(SATURATION) * np.float32(SATURATION)
    return np.where(y > lim, np.copysign(np.float32(1.0), x), t)


def worst_over_floats(n, d, lo, hi):
    """Max abs error of the f32 program over every f32 in [lo, hi), in ulp of 1-."""
    b0, b1 = int(np.float32(lo).view(np.uint32)), int(np.float32(hi).view(np.uint32))
    worst = 0.0
    for start in range(b0, b1, 1 << 22):
        x = np.arange(start, min(start + (1 << 22), b1), dtype=np.uint32).view(np.float32)
        e = np.abs(tanh_f32(x, n, d).astype(np.float64) - np.tanh(x.astype(np.float64)))
        worst = max(worst, e.max())
    return worst / 2.0**-24


def polish(n, d, lo=0.5, hi=SATURATION, rounds=2, reach=3):
    """Coordinate search over the f32 coefficients (each moved by up to
    `reach` ulp, D's leading 1 kept) minimising the f32 program's maximum
    error over every f32 in [lo, hi): the fit minimises the approximation
    error, this trades the last fraction of an ulp of rounding."""
    coefs = [n.copy(), d.copy()]
    best = worst_over_floats(coefs[0], coefs[1], lo, hi)
    for _ in range(rounds):
        for which, count in ((0, len(n)), (1, len(d) - 1)):
            for i in range(count):
                base = coefs[which][i].view(np.uint32)
                for step in [k for k in range(-reach, reach + 1) if k != 0]:
                    trial = [coefs[0].copy(), coefs[1].copy()]
                    trial[which][i] = np.uint32(int(base) + step).view(np.float32)
                    e = worst_over_floats(trial[0], trial[1], lo, hi)
                    if e < best:
                        best, coefs = e, trial
    return coefs[0], coefs[1], best


def main():
    s = nodes()
    v = s * s
    r = target(s)
    scale = error_scale(s)
    m, n, d = rational_fit(v, r, scale)
    print(f"rational fit in f64: max error it causes in t, relative: {m:.3e}")
    d32 = d.astype(np.float32).astype(np.float64)
    m2, n = refit_numerator(v, r, scale, d32)
    n32 = n.astype(np.float32).astype(np.float64)
    fit_err = np.abs((poly.polyval(v, n32) / poly.polyval(v, d32) - r) * scale).max()
    print(f"after rounding D, refitting N, rounding N: {fit_err:.3e}")
    nx, dx = in_x_squared(n32, d32)
    nx, dx = nx.astype(np.float32), dx.astype(np.float32)
    print(f"f32 program, every f32 in [0.5, 9]: max abs error "
          f"{worst_over_floats(nx, dx, 0.5, SATURATION):.3f} ulp of 1- (rounded fit)")
    nx, dx, w = polish(nx, dx)
    print(f"after the coordinate search: {w:.3f} ulp of 1-")
    for name, cs in (("N", nx), ("D", dx)):
        for i, c in enumerate(cs):
            print(f"  {name}{i} = {float(c)!r}  (bits {c.view(np.uint32):#010x})")
    xs = np.linspace(-12.0, 12.0, 2_000_001).astype(np.float32)
    t = tanh_f32(xs, nx, dx).astype(np.float64)
    ref = np.tanh(xs.astype(np.float64))
    e = np.abs(t - ref)
    near0 = (np.abs(xs) < 1.0) & (xs != 0)
    rel = np.abs(t[near0] / ref[near0] - 1.0).max()
    print(f"f32 program at 2,000,001 points over [-12, 12]: max abs error {e.max():.3e} "
          f"({e.max() / 2.0**-24:.2f} ulp of 1-) at x = {xs[e.argmax()]}; "
          f"max relative error for 0 < |x| < 1: {rel:.3e}; max |t| {np.abs(t).max()}")


if __name__ == "__main__":
    main()
