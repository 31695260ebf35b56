"""Derivation of pliant's elastic brush kernels, their proofs, and the generator of `_generated.py`.

This module is the source of truth for every formula the engine evaluates. It follows
F. de Goes and D. L. James, "Regularized Kelvinlets: Sculpting Brushes based on Fundamental
Solutions of Elasticity", ACM Trans. Graph. 36(4), 2017 (referred to below as [dGJ17]).

What is derived, with sympy:

1. The regularized load density ``rho_eps(r) = 15 eps^4 / (8 pi (r^2 + eps^2)^(7/2))`` ([dGJ17] eq. 8).
2. The regularized Kelvinlet ``u = K_eps(r) f`` with
   ``K_eps = [(a - b)/r_eps + a eps^2 / (2 r_eps^3)] I + b / r_eps^3 r r^T``,
   ``a = 1 / (4 pi mu)``, ``b = a / (4 (1 - nu))``, ``r_eps = sqrt(r^2 + eps^2)`` ([dGJ17] eq. 9),
   and a proof that it solves the Navier-Cauchy equations
   ``mu lap(u) + (lambda + mu) grad(div u) + rho_eps f = 0`` with ``lambda = 2 mu nu / (1 - 2 nu)``.
3. The locally affine loads: ``u_i = sum_jk d_k K_ij F_jk`` for a 3x3 load matrix F ([dGJ17] sec. 4),
   written as ``u = P F r + Q (F^T r + tr(F) r) + S (r . F r) r`` with scalar profiles P, Q, S,
   and a proof that it solves Navier-Cauchy under the load ``b_i = F_ik d_k rho_eps``.
   Twist is the skew part of F, scale the isotropic part, pinch the symmetric traceless part.
4. The centre normalization constants: the grab's value at its centre and the affine kernels'
   Jacobians at their centre, so each brush is specified by what the artist asks for.
5. The closed-form Jacobians, proved equal to sympy's own differentiation.
6. The multi-scale combinations ([dGJ17] sec. 5): weights over radii ``eps * ratio_i`` that cancel
   the far-field terms of order ``eps^0`` (medium) and also ``eps^2`` (tight).
7. The maximum over space of each unit kernel's gradient norm (spectral norm; Frobenius-operator
   bound for pinch), tabulated over Poisson's ratio for the flow's step control.
8. For handles (`brushes.handles`): the twist profile G = P - Q of a skew load, the skew parts of
   the grab and twist Jacobians that the handle solve matches, pointwise bounds of the gradient
   norm at a distance from one kernel as sums of monomials with one proved peak each, and a fused
   kernel summing forces and twist loads at many centres in one pass over the points.

Run ``python -m brushes.kernels.derive --write`` to regenerate `_generated.py` and
``python -m brushes.kernels.derive --check`` to re-derive everything in memory, re-run every proof and
fail if the committed file differs.
"""
from __future__ import annotations

import argparse
import itertools
import os
import sys
import time

import numpy as np
import sympy as sp

# ---------------------------------------------------------------------------------------------
# Symbols and the elastic setting
# ---------------------------------------------------------------------------------------------
x, y, z = sp.symbols("x y z", real=True)
X = (x, y, z)
R = sp.Matrix(X)
eps, mu = sp.symbols("epsilon mu", positive=True)
nu = sp.Symbol("nu", real=True)
s = sp.Symbol("s", positive=True)  # s stands for r_eps = sqrt(r^2 + eps^2)
r2_sym = sp.Symbol("r2", nonnegative=True)  # r2 stands for |r|^2
beta = sp.Symbol("beta", positive=True)  # beta = b / a = 1 / (4 (1 - nu))

r2 = x**2 + y**2 + z**2
r_eps = sp.sqrt(r2 + eps**2)
a_coef = 1 / (4 * sp.pi * mu)
b_coef = a_coef / (4 * (1 - nu))
lam = 2 * mu * nu / (1 - 2 * nu)

#: Relative radii of the falloffs: each brush's ``radius`` times these ratios. "wide" is one
#: regularized solution; "medium" and "tight" combine two and three of them ([dGJ17] sec. 5).
FALLOFF_RATIOS = {
    "wide": (sp.Integer(1),),
    "medium": (sp.Integer(1), sp.Rational(3, 2)),
    "tight": (sp.Integer(1), sp.Rational(3, 2), sp.Rational(9, 4)),
}


def load_density():
    """rho_eps(r) of [dGJ17] eq. 8 as a sympy expression in x, y, z, eps."""
    return 15 * eps**4 / (8 * sp.pi * r_eps**7)


def kelvinlet_matrix():
    """K_eps(r) of [dGJ17] eq. 9 as a 3x3 sympy Matrix."""
    return ((a_coef - b_coef) / r_eps + a_coef * eps**2 / (2 * r_eps**3)) * sp.eye(3) \
        + b_coef / r_eps**3 * R * R.T


def navier_cauchy(u, load):
    """Residual ``mu lap(u) + (lambda + mu) grad(div u) + load`` (3 components)."""
    div = sum(sp.diff(u[i], X[i]) for i in range(3))
    return [mu * sum(sp.diff(u[i], v, 2) for v in X) + (lam + mu) * sp.diff(div, X[i]) + load[i]
            for i in range(3)]


# ---------------------------------------------------------------------------------------------
# Scalar profiles (per unit a = 1 / (4 pi mu)); the generated code evaluates these
# ---------------------------------------------------------------------------------------------
def grab_profiles():
    """K_eps = a [A(s) I + B(s) r r^T] with s = r_eps: returns (A, B) in s, eps, beta."""
    A = (1 - beta) / s + eps**2 / (2 * s**3)
    B = beta / s**3
    return A, B


def affine_profiles():
    """u_F = a [P F r + Q (F^T r + tr F r) + S (r.F r) r]: returns (P, Q, S) in s, eps, beta.

    From K = A I + B r r^T: d_k K_ij = A'(s) r_k / s d_ij + B'(s) r_k / s r_i r_j
    + B (d_ik r_j + d_jk r_i), so P = A'/s, Q = B, S = B'/s (proved in `prove_affine`).
    """
    A, B = grab_profiles()
    return sp.diff(A, s) / s, B, sp.diff(B, s) / s


def _d_over_s(expr):
    """(d expr / d s) / s: the factor that multiplies r_l in d/dx_l of a profile of s."""
    return sp.simplify(sp.diff(expr, s) / s)


def _in_xyz(expr):
    return expr.subs({beta: 1 / (4 * (1 - nu))}).subs(s, r_eps)


# ---------------------------------------------------------------------------------------------
# Proofs
# ---------------------------------------------------------------------------------------------
def _rational_points(count=4):
    """Points (x, y, z, eps) with rational r_eps, so exact arithmetic stays rational."""
    found = []
    for vals in itertools.product(range(-3, 7), repeat=4):
        xx, yy, zz, ee = vals
        if ee <= 0:
            continue
        q = xx * xx + yy * yy + zz * zz + ee * ee
        root = sp.sqrt(q)
        if root.is_Integer and len({abs(xx), abs(yy), abs(zz)}) == 3 and 0 not in (xx, yy, zz):
            found.append(vals)
        if len(found) >= count:
            break
    return found


SAMPLE_NUS = (sp.Rational(3, 10), sp.Rational(-1, 3), sp.Rational(1, 7))
SAMPLE_MU = sp.Rational(7, 5)


def _zero_at_samples(build, nus=SAMPLE_NUS):
    """True if every expression from ``build(eps_value, nu_value)`` is exactly zero at the
    rational sample points.

    ``build`` returns expressions in x, y, z only (the material constants already substituted),
    so the differentiation inside it stays small; then exact rational arithmetic decides.
    """
    cache = {}
    for (xx, yy, zz, ee), nn in itertools.product(_rational_points(), nus):
        key = (ee, nn)
        if key not in cache:
            cache[key] = build(sp.Integer(ee), nn)
        for e in cache[key]:
            if sp.nsimplify(sp.simplify(e.subs({x: xx, y: yy, z: zz}))) != 0:
                return False
    return True


def _fixed(expr, e_val, n_val):
    return expr.subs({eps: e_val, nu: n_val, mu: SAMPLE_MU})


def prove_density_integral():
    """The load density integrates to 1 over space (radial integral, exactly)."""
    r = sp.Symbol("r", positive=True)
    total = sp.integrate(4 * sp.pi * r**2 * 15 * eps**4 / (8 * sp.pi * (r**2 + eps**2) ** sp.Rational(7, 2)),
                         (r, 0, sp.oo))
    return sp.simplify(total - 1) == 0


def prove_grab():
    """u = K_eps f solves Navier-Cauchy under rho_eps f, fully symbolically ([dGJ17] eq. 9)."""
    f = sp.Matrix(sp.symbols("f1:4", real=True))
    u = kelvinlet_matrix() * f
    rho = load_density()
    res = navier_cauchy(u, [rho * f[i] for i in range(3)])
    ok = all(sp.simplify(sp.together(c)) == 0 for c in res)
    # the profile form used by the generated code is the same field
    A, B = grab_profiles()
    K2 = a_coef * (_in_xyz(A) * sp.eye(3) + _in_xyz(B) * R * R.T)
    same = all(sp.simplify(c) == 0 for c in (K2 - kelvinlet_matrix()))
    return ok and same


def _affine_field(F):
    K = kelvinlet_matrix()
    return sp.Matrix([sum(sp.diff(K[i, j], X[k]) * F[j, k] for j in range(3) for k in range(3))
                      for i in range(3)])


def prove_affine():
    """The affine kernel solves Navier-Cauchy under the load b_i = F_ik d_k rho_eps, and equals
    the profile form P F r + Q (F^T r + tr F r) + S (r.Fr) r ([dGJ17] sec. 4).

    Proved exactly at rational sample points for a generic rational F (full simplification is slow).
    """
    F = sp.Matrix(3, 3, [sp.Rational(v, 7) for v in (3, -2, 5, 1, 4, -6, 2, 9, -1)])

    def build(e_val, n_val):
        K = _fixed(kelvinlet_matrix(), e_val, n_val)
        u = sp.Matrix([sum(sp.diff(K[i, j], X[k]) * F[j, k] for j in range(3) for k in range(3))
                       for i in range(3)])
        rho = _fixed(load_density(), e_val, n_val)
        load = [sum(sp.diff(rho, X[k]) * F[i, k] for k in range(3)) for i in range(3)]
        res = _fixed_navier(u, load, n_val)
        P, Q, S = (_fixed(a_coef * _in_xyz(p), e_val, n_val) for p in affine_profiles())
        Fr = F * R
        tmpl = P * Fr + Q * (F.T * R + F.trace() * R) + S * (R.T * Fr)[0] * R
        return res + list(tmpl - u)

    return _zero_at_samples(build)


def _fixed_navier(u, load, n_val):
    lam_v = 2 * SAMPLE_MU * n_val / (1 - 2 * n_val)
    div = sum(sp.diff(u[i], X[i]) for i in range(3))
    return [SAMPLE_MU * sum(sp.diff(u[i], v, 2) for v in X) + (lam_v + SAMPLE_MU) * sp.diff(div, X[i]) + load[i]
            for i in range(3)]


def grab_jacobian_template(A, B, dA, dB, m):
    """J_il = dA m_i r_l + B (m_l r_i + (r.m) d_il) + dB (r.m) r_i r_l (dX = X'(s)/s)."""
    rm = (R.T * m)[0]
    return dA * m * R.T + B * (R * m.T + rm * sp.eye(3)) + dB * rm * R * R.T


def affine_jacobian_template(P, Q, S, dP, dQ, dS, F):
    """Closed-form d u_i / d x_l of the affine profile form."""
    Fr = F * R
    Ftr = F.T * R
    rFr = (R.T * Fr)[0]
    tr = F.trace()
    J = P * F + Q * (F.T + tr * sp.eye(3)) + S * (rFr * sp.eye(3) + R * ((F + F.T) * R).T)
    J += (dP * Fr + dQ * (Ftr + tr * R) + dS * rFr * R) * R.T
    return J


def prove_jacobians():
    """Both Jacobian templates equal sympy's own differentiation of the displacement
    (grab fully symbolically; affine exactly at rational sample points)."""
    m = sp.Matrix(sp.symbols("m1:4", real=True))
    A, B = grab_profiles()
    ug = _in_xyz(A) * m + _in_xyz(B) * (R.T * m)[0] * R
    Jg = grab_jacobian_template(*(_in_xyz(e) for e in (A, B, _d_over_s(A), _d_over_s(B))), m)
    ok = all(sp.simplify(Jg[i, l] - sp.diff(ug[i], X[l])) == 0 for i in range(3) for l in range(3))
    F = sp.Matrix(3, 3, [sp.Rational(v, 5) for v in (1, 2, -3, 4, 0, 6, -2, 5, 3)])
    P, Q, S = affine_profiles()

    def build(e_val, n_val):
        prof = [_fixed(_in_xyz(e), e_val, n_val)
                for e in (P, Q, S, _d_over_s(P), _d_over_s(Q), _d_over_s(S))]
        Fr = F * R
        ua = prof[0] * Fr + prof[1] * (F.T * R + F.trace() * R) + prof[2] * (R.T * Fr)[0] * R
        Ja = affine_jacobian_template(*prof, F)
        return [Ja[i, l] - sp.diff(ua[i], X[l]) for i in range(3) for l in range(3)]

    return ok and _zero_at_samples(build, nus=SAMPLE_NUS[:1])


def prove_incompressible():
    """At nu = 1/2 the grab and the trace-free affine kernels are divergence-free."""
    f = sp.Matrix(sp.symbols("f1:4", real=True))
    u = (kelvinlet_matrix() * f).subs(nu, sp.Rational(1, 2))
    ok = sp.simplify(sum(sp.diff(u[i], X[i]) for i in range(3))) == 0
    F = sp.Matrix([[sp.Rational(2, 3), 1, sp.Rational(1, 2)], [-3, sp.Rational(-1, 5), 5],
                   [2, -1, sp.Rational(-7, 15)]])  # trace-free, neither symmetric nor skew

    def build(e_val, n_val):
        K = _fixed(kelvinlet_matrix(), e_val, n_val)
        ua = [sum(sp.diff(K[i, j], X[k]) * F[j, k] for j in range(3) for k in range(3)) for i in range(3)]
        return [sum(sp.diff(ua[i], X[i]) for i in range(3))]

    return ok and _zero_at_samples(build, nus=(sp.Rational(1, 2),))


# ---------------------------------------------------------------------------------------------
# Centre normalization and multi-scale weights
# ---------------------------------------------------------------------------------------------
def center_constants():
    """Per unit a, the centre values at r = 0 (s = eps), as functions of eps and beta.

    grab:  u(0) = G f,                 G = A(eps)
    affine: J(0) = P F + Q (F^T + tr F I), so
      skew part:        J(0) = (P - Q) F       -> "twist"
      symmetric traceless: J(0) = (P + Q) F    -> "pinch"
      isotropic F = c I: J(0) = (P + 4 Q) F    -> "scale"
    """
    A, _ = grab_profiles()
    P, Q, _S = affine_profiles()
    at0 = {s: eps}
    return {
        "grab": sp.simplify(A.subs(at0)),
        "twist": sp.simplify((P - Q).subs(at0)),
        "pinch": sp.simplify((P + Q).subs(at0)),
        "scale": sp.simplify((P + 4 * Q).subs(at0)),
    }


def prove_center_constants():
    """The centre constants agree with sympy's limit of the full kernels at r -> 0."""
    c = center_constants()
    f = sp.Matrix([sp.Rational(2), sp.Rational(-1), sp.Rational(3)])
    u0 = (kelvinlet_matrix() * f).subs({x: 0, y: 0, z: 0})
    ok = all(sp.simplify(u0[i] - a_coef * c["grab"].subs(beta, 1 / (4 * (1 - nu))) * f[i]) == 0 for i in range(3))
    F = sp.Matrix([[0, 2, 0], [-2, 0, 3], [0, -3, 0]])  # skew
    J0 = _affine_field(F).jacobian(R).subs({x: 0, y: 0, z: 0})
    ok &= all(sp.simplify(e) == 0 for e in J0 - a_coef * _in_xyz(c["twist"]) * F)
    F = sp.Matrix([[1, 2, 0], [2, -3, 1], [0, 1, 2]])  # symmetric traceless
    J0 = _affine_field(F).jacobian(R).subs({x: 0, y: 0, z: 0})
    ok &= all(sp.simplify(e) == 0 for e in J0 - a_coef * _in_xyz(c["pinch"]) * F)
    J0 = _affine_field(sp.eye(3)).jacobian(R).subs({x: 0, y: 0, z: 0})
    ok &= all(sp.simplify(e) == 0 for e in J0 - a_coef * _in_xyz(c["scale"]) * sp.eye(3))
    return ok


def multiscale_weights(ratios):
    """Weights w_i (w_0 = 1) over radii eps * ratio_i that cancel the far-field series terms.

    The profiles expand for r >> eps as sum_k c_k(r) eps^(2k). Cancelling k = 0 .. K-2 for K
    radii gives sum_i w_i ratio_i^(2k) = 0, a linear system ([dGJ17] sec. 5, the extrapolation).
    """
    n = len(ratios)
    if n == 1:
        return (sp.Integer(1),)
    w = sp.symbols(f"w0:{n}")
    eqs = [sp.Eq(w[0], 1)] + [sp.Eq(sum(w[i] * ratios[i] ** (2 * k) for i in range(n)), 0) for k in range(n - 1)]
    sol = sp.solve(eqs, w, dict=True)[0]
    return tuple(sp.nsimplify(sol[wi]) for wi in w)


def prove_far_field(ratios, weights):
    """The combined grab profile decays as r^-(2K-1) (K radii): the series terms cancel."""
    r = sp.Symbol("r", positive=True)
    A, B = grab_profiles()
    order = 2 * len(ratios) - 1
    ok = True
    # substitute each radius' own s_i = sqrt(r^2 + (eps q_i)^2) and expand at r -> oo
    terms_A, terms_B = 0, 0
    for w, q in zip(weights, ratios):
        si = sp.sqrt(r**2 + (eps * q) ** 2)
        terms_A += w * A.subs(eps, eps * q).subs(s, si)
        terms_B += w * (B.subs(eps, eps * q) * r**2).subs(s, si)
    for expr in (terms_A, terms_B):
        lead = sp.limit(expr * r**order, r, sp.oo)
        below = sp.limit(expr * r ** (order - 1), r, sp.oo)
        ok &= below == 0 and lead != 0
    return ok


# ---------------------------------------------------------------------------------------------
# Gradient bounds (for the flow's fold-free step control)
# ---------------------------------------------------------------------------------------------
BOUND_NUS = tuple(np.round(np.linspace(-0.99, 0.5, 16), 6))


def _numeric_profiles():
    """numpy functions of (s, eps, beta) for A, B, dA, dB, P, Q, S, dP, dQ, dS."""
    A, B = grab_profiles()
    P, Q, S = affine_profiles()
    exprs = {"A": A, "B": B, "dA": _d_over_s(A), "dB": _d_over_s(B),
             "P": P, "Q": Q, "S": S, "dP": _d_over_s(P), "dQ": _d_over_s(Q), "dS": _d_over_s(S)}
    return {k: sp.lambdify((s, eps, beta), v, "numpy") for k, v in exprs.items()}


def _combined(fns, names, rho, ratios, weights, b):
    out = []
    for name in names:
        tot = 0.0
        for w, q in zip(weights, ratios):
            si = np.sqrt(rho**2 + float(q) ** 2)
            tot = tot + float(w) * fns[name](si, float(q), b)
        out.append(tot)
    return out


def _rho_grid():
    return np.concatenate([np.linspace(0.0, 4.0, 801)[1:], np.linspace(4.0, 40.0, 181)[1:]])


def _grab_bound(fns, ratios, weights, b):
    """sup over space of ||J||_2 for the unit normalized grab (|move| = 1, radius = 1)."""
    return float(_grab_norms(fns, ratios, weights, b, _rho_grid()).max())


def _grab_norms(fns, ratios, weights, b, rho):
    """||J||_2 of the unit normalized grab at distances rho (n,) and 91 angles between move and r."""
    norm = sum(float(w) * fns["A"](float(q), float(q), b) for w, q in zip(weights, ratios))
    theta = np.linspace(0.0, np.pi / 2, 91)
    RR, TT = np.meshgrid(rho, theta, indexing="ij")
    A, B, dA, dB = _combined(fns, ("A", "B", "dA", "dB"), RR, ratios, weights, b)
    r = np.stack([RR, 0 * RR, 0 * RR], -1)
    m = np.stack([np.cos(TT), 0 * TT, np.sin(TT)], -1)
    rm = (r * m).sum(-1)
    J = dA[..., None, None] * m[..., :, None] * r[..., None, :] \
        + B[..., None, None] * (r[..., :, None] * m[..., None, :] + rm[..., None, None] * np.eye(3)) \
        + (dB * rm)[..., None, None] * r[..., :, None] * r[..., None, :]
    return np.linalg.norm(J / norm, ord=2, axis=(-2, -1))


def _affine_basis(kind):
    if kind == "twist":
        mats = [np.array([[0, -1, 0], [1, 0, 0], [0, 0, 0.0]]), np.array([[0, 0, 1], [0, 0, 0], [-1, 0, 0.0]]),
                np.array([[0, 0, 0], [0, 0, -1], [0, 1, 0.0]])]
        return [m_ / np.linalg.norm(m_) * np.sqrt(2) for m_ in mats]  # unit rotation rate
    if kind == "scale":
        return [np.eye(3)]
    mats = [np.diag([1, -1, 0.0]), np.diag([1, 1, -2.0]), np.array([[0, 1, 0], [1, 0, 0], [0, 0, 0.0]]),
            np.array([[0, 0, 1], [0, 0, 0], [1, 0, 0.0]]), np.array([[0, 0, 0], [0, 0, 1], [0, 1, 0.0]])]
    return [m_ / np.linalg.norm(m_) for m_ in mats]


def _affine_bound(fns, kind, ratios, weights, b):
    """sup over space of ||J||_2 per unit centre-gradient for twist and scale (exact, by symmetry);
    for pinch the operator norm of G -> J(G) from Frobenius to Frobenius (an upper bound)."""
    key = {"twist": ("P", "Q", -1), "pinch": ("P", "Q", 1), "scale": ("P", "Q", 4)}[kind]
    c0 = sum(float(w) * (fns["P"](float(q), float(q), b) + key[2] * fns["Q"](float(q), float(q), b))
             for w, q in zip(weights, ratios))
    rho = _rho_grid()
    P, Q, S, dP, dQ, dS = _combined(fns, ("P", "Q", "S", "dP", "dQ", "dS"), rho, ratios, weights, b)
    if kind == "twist":
        return float(_twist_norms(fns, ratios, weights, b, rho).max())
    if kind == "scale":
        Fs = np.broadcast_to(np.eye(3), rho.shape + (3, 3))
        J = _affine_J_numeric(rho, (P, Q, S, dP, dQ, dS), Fs)
        return float(np.linalg.norm(J / c0, ord=2, axis=(-2, -1)).max())
    basis = _affine_basis("pinch")
    cols = [(_affine_J_numeric(rho, (P, Q, S, dP, dQ, dS), np.broadcast_to(B_, rho.shape + (3, 3))) / c0)
            .reshape(rho.shape + (9,)) for B_ in basis]
    L = np.stack(cols, -1)  # (n, 9, 5)
    return float(np.linalg.norm(L, ord=2, axis=(-2, -1)).max())


def _twist_norms(fns, ratios, weights, b, rho):
    """||J||_2 of the unit normalized twist (1 radian, radius 1) at distances rho (n,) and 91 angles
    between the rotation axis and r (by symmetry, r along x)."""
    c0 = sum(float(w) * (fns["P"](float(q), float(q), b) - fns["Q"](float(q), float(q), b))
             for w, q in zip(weights, ratios))
    P, Q, S, dP, dQ, dS = _combined(fns, ("P", "Q", "S", "dP", "dQ", "dS"), rho, ratios, weights, b)
    t = np.linspace(0, np.pi / 2, 91)
    RR, TT = np.meshgrid(rho, t, indexing="ij")
    Fs = np.zeros(RR.shape + (3, 3))
    q = np.stack([np.cos(TT), np.sin(TT), 0 * TT], -1)
    Fs[..., 0, 1], Fs[..., 0, 2], Fs[..., 1, 2] = -q[..., 2], q[..., 1], -q[..., 0]
    Fs[..., 1, 0], Fs[..., 2, 0], Fs[..., 2, 1] = q[..., 2], -q[..., 1], q[..., 0]
    J = _affine_J_numeric(RR, [np.broadcast_to(v[:, None], RR.shape) for v in (P, Q, S, dP, dQ, dS)], Fs)
    return np.linalg.norm(J / c0, ord=2, axis=(-2, -1))


#: Distances (in radii) of the radial bounds: every 0.05 radii to 6, then 5% apart to about 200.
RADIAL_GRID = tuple(float(v) for v in np.round(np.concatenate([np.arange(0.0, 6.0, 0.05),
                                                                6.0 * 1.05 ** np.arange(73)]), 6))


def _round_up(values, digits=4):
    """Each value rounded up to `digits` significant digits (a bound stays a bound)."""
    out = []
    for v in values:
        if v <= 0:
            out.append(0.0)
            continue
        scale = 10.0 ** (int(np.floor(np.log10(v))) - digits + 1)
        out.append(float(np.round(np.ceil(v / scale * (1 - 1e-12)) * scale, 12)))
    return tuple(out)


def radial_bounds():
    """{kind: {falloff: rows}}: for the unit normalized grab (per Poisson's ratio in BOUND_NUS) and
    twist (one row: its profile is free of nu), at each distance rho of RADIAL_GRID the largest
    ||J||_2 over every direction, +2% margin, rounded up. The largest entry over the grid points
    that bracket an interval of distances bounds the interval (`brushes.kernels.radial_bound`);
    beyond the grid `brushes.kernels.gradient_envelope` bounds the tail in closed form.
    """
    fns = _numeric_profiles()
    rho = np.asarray(RADIAL_GRID)
    table = {"grab": {}, "twist": {}}
    for falloff, ratios in FALLOFF_RATIOS.items():
        weights = multiscale_weights(ratios)
        for kind in table:
            nus = BOUND_NUS if kind == "grab" else BOUND_NUS[-1:]
            rows = []
            for n_ in nus:
                b = 1.0 / (4.0 * (1.0 - n_))
                norms = (_grab_norms if kind == "grab" else _twist_norms)(fns, ratios, weights, b, rho).max(axis=1)
                rows.append(_round_up(1.02 * norms))
            table[kind][falloff] = rows
    return table


def _affine_J_numeric(rho, prof, F):
    P, Q, S, dP, dQ, dS = (np.asarray(p)[..., None, None] for p in prof)
    r = np.zeros(np.shape(rho) + (3,))
    r[..., 0] = rho
    Fr = np.einsum("...ij,...j->...i", F, r)
    Ftr = np.einsum("...ji,...j->...i", F, r)
    rFr = np.einsum("...i,...i->...", r, Fr)[..., None, None]
    tr = np.trace(F, axis1=-2, axis2=-1)[..., None, None]
    I3 = np.eye(3)
    J = P * F + Q * (np.swapaxes(F, -1, -2) + tr * I3) \
        + S * (rFr * I3 + r[..., :, None] * (Fr + Ftr)[..., None, :])
    J = J + (dP * Fr[..., :, None] + dQ * (Ftr + tr[..., 0] * r)[..., :, None]
             + dS * rFr * r[..., :, None]) * r[..., None, :]
    return J


def gradient_bounds():
    """Table {kind: {falloff: [bound at each nu in BOUND_NUS]}}, each entry a float.

    The unit kernels have radius 1 and unit strength (|move| = 1, 1 radian per unit pseudo-time,
    unit log-scale rate, unit Frobenius-norm pinch gradient). A brush of radius eps and strength
    k has the bound k / eps times the entry. Entries carry a 1% margin over the sampled maximum.
    """
    fns = _numeric_profiles()
    table = {}
    for kind in ("grab", "twist", "scale", "pinch"):
        table[kind] = {}
        for falloff, ratios in FALLOFF_RATIOS.items():
            weights = multiscale_weights(ratios)
            vals = []
            for n_ in BOUND_NUS:
                b = 1.0 / (4.0 * (1.0 - n_))
                if kind == "grab":
                    v = _grab_bound(fns, ratios, weights, b)
                elif kind == "twist" and vals:
                    v = vals[-1] / 1.01  # the twist profile P - Q = -1/s^3 - 3 eps^2/(2 s^5) is free of nu
                elif kind == "scale":
                    # the normalized scale profile does not depend on nu (the factor 2 beta - 1
                    # cancels); nu = 1/2 itself is refused, so tabulate the nu = 0 value throughout
                    v = _affine_bound(fns, kind, ratios, weights, 0.25)
                else:
                    v = _affine_bound(fns, kind, ratios, weights, b)
                vals.append(round(v * 1.01, 6))
            table[kind][falloff] = vals
    return table


# ---------------------------------------------------------------------------------------------
# Handles: forces and twist loads at several centres, solved together (brushes.handles)
# ---------------------------------------------------------------------------------------------
rho = sp.Symbol("rho", nonnegative=True)  # distance from a kernel's centre
t_var = sp.Symbol("t", positive=True)  # t = 1 / r_eps in the generated code

def _cross_matrix(v):
    """[v]x as a sympy Matrix: [v]x w == v x w."""
    return sp.Matrix([[0, -v[2], v[1]], [v[2], 0, -v[0]], [-v[1], v[0], 0]])


def twist_profile():
    """G(s) with u = a G(s) (tau x r), the field of the skew load F = [tau]x: G = P - Q."""
    P, Q, _S = affine_profiles()
    return sp.simplify(P - Q)


def prove_handle_terms():
    """The identities the handle solve is built from, with the profiles as free symbols.

    1. a skew load F = [tau]x gives u = (P - Q) tau x r: the twist field is G tau x r;
    2. the skew part of the grab Jacobian is [(dA - B)/2 (r x m)]x, so a force at one handle
       turns the material at another by (dA - B)/2 (r x m);
    3. the skew part of the twist Jacobian is [(G + dG/2 (|r|^2 I - r r^T)) tau]x, dG = dP - dQ.
    """
    P, Q, S, dP, dQ, dS, A, B, dA, dB = sp.symbols("P Q S dP dQ dS A B dA dB", real=True)
    tau = sp.Matrix(sp.symbols("tau1:4", real=True))
    m = sp.Matrix(sp.symbols("m1:4", real=True))
    F = _cross_matrix(tau)
    Fr = F * R
    u = P * Fr + Q * (F.T * R + F.trace() * R) + S * (R.T * Fr)[0] * R
    ok = all(sp.expand(e) == 0 for e in u - (P - Q) * tau.cross(R))
    Jg = grab_jacobian_template(A, B, dA, dB, m)
    ok &= all(sp.expand(e) == 0 for e in (Jg - Jg.T) / 2 - _cross_matrix((dA - B) / 2 * R.cross(m)))
    Ja = affine_jacobian_template(P, Q, S, dP, dQ, dS, F)
    spin = ((P - Q) * sp.eye(3) + (dP - dQ) / 2 * ((R.T * R)[0] * sp.eye(3) - R * R.T)) * tau
    ok &= all(sp.expand(e) == 0 for e in (Ja - Ja.T) / 2 - _cross_matrix(spin))
    # and with the derived profiles, dP - dQ is the twist profile's own dG = G'(s) / s
    P_, Q_, _S = affine_profiles()
    ok &= sp.simplify(_d_over_s(twist_profile()) - _d_over_s(P_) + _d_over_s(Q_)) == 0
    return ok


def _in_t(expr):
    """A profile of s written in t = 1 / s and rho (no eps -> e renaming: eps stays eps)."""
    return sp.expand(sp.simplify(expr).subs(s, 1 / t_var))


def _abs_terms(expr):
    """Sum of the absolute values of the monomials of `expr`, a polynomial in t (and rho) whose
    coefficients are linear in beta: an upper bound of |expr| for beta in (1/8, 1/2], that is
    Poisson's ratio in (-1, 1/2]. Returns None if a coefficient changes sign on that range."""
    total = 0
    poly = sp.Poly(sp.expand(expr), t_var, rho)
    for (bt, ar), coeff in poly.terms():
        lo, hi = (coeff.subs(beta, sp.Rational(1, 8)).subs(eps, 1), coeff.subs(beta, sp.Rational(1, 2)).subs(eps, 1))
        if lo * hi < 0:
            return None
        sign = 1 if (lo + hi) >= 0 else -1
        total += sign * coeff * t_var**bt * rho**ar
    return total


def gradient_envelopes():
    """Pointwise bounds, per unit a, of ||J||_2 at distance rho from one unit kernel.

    grab with unit move (J = dA m r^T + B (r m^T + (r.m) I) + dB (r.m) r r^T, dX = X'(s)/s):
        ||J|| <= |dA| rho + 2 |B| rho + |dB| rho^3;
    twist with unit tau (J = G [tau]x + dG (tau x r) r^T):
        ||J|| <= |G| + |dG| rho^2,
    with |X| the sum of the absolute values of X's monomials in t. Returns {"grab": expr,
    "twist": expr} in t, rho, eps and beta.
    """
    A, B = grab_profiles()
    G = twist_profile()
    grab = _abs_terms(_in_t(_d_over_s(A))) * rho + 2 * _abs_terms(_in_t(B)) * rho \
        + _abs_terms(_in_t(_d_over_s(B))) * rho**3
    twist = _abs_terms(_in_t(G)) + _abs_terms(_in_t(_d_over_s(G))) * rho**2
    return {"grab": sp.expand(grab), "twist": sp.expand(twist)}


def envelope_terms(kind):
    """The monomials (p, q, c) of an envelope, c rho^p t^q with c >= 0 (in eps and beta), sorted."""
    return sorted(((p, q, c) for (q, p), c in sp.Poly(gradient_envelopes()[kind], t_var, rho).terms()),
                  key=lambda m: (m[0], m[1]))


def prove_envelope_peaks():
    """Each envelope monomial c rho^p t^q has c >= 0 on Poisson's ratio (-1, 1/2], q > p, and one
    peak over rho >= 0, at rho^2 = p eps^2 / (q - p): rising before it, falling after.

    d/drho [rho^p (rho^2 + eps^2)^(-q/2)] = rho^(p-1) (rho^2 + eps^2)^(-q/2-1) (p eps^2 + (p - q) rho^2),
    so the maximum of a monomial over an interval is at the peak clipped into the interval.
    """
    env = gradient_envelopes()
    if any(v is None for v in env.values()):
        return False
    ok = True
    for kind in env:
        for p, q, c in envelope_terms(kind):
            ok &= q > p and all(c.subs({beta: b_, eps: 1}) >= 0 for b_ in (sp.Rational(1, 8), sp.Rational(1, 2)))
            mono = rho**p * (rho**2 + eps**2) ** sp.Rational(-q, 2)
            factor = sp.simplify(sp.diff(mono, rho) / (rho ** (p - 1) * (rho**2 + eps**2) ** sp.Rational(-q - 2, 2)))
            ok &= sp.expand(factor - (p * eps**2 + (p - q) * rho**2)) == 0
    return bool(ok)


# ---------------------------------------------------------------------------------------------
# Code generation
# ---------------------------------------------------------------------------------------------
HEADER = '''"""GENERATED by `python -m brushes.kernels.derive --write`. DO NOT EDIT BY HAND.

Regularized Kelvinlet kernels (de Goes & James, ACM Trans. Graph. 36(4), 2017), derived and proved
in `brushes/kernels/derive.py`; `python -m brushes.kernels.derive --check` proves this file matches the derivation.
Profiles are per unit a = 1 / (4 pi mu); `s` is r_eps = sqrt(r^2 + eps^2), `beta` = 1 / (4 (1 - nu)).
Each kernel sums over radii `eps[k]` with weights `w[k]` (normalization folded into the weights).
"""
import math

import numpy as np
'''


def _cse_block(exprs, names, indent, prefix):
    """Emit common-subexpression-eliminated assignments computing `names` from t, e, beta.

    Profiles are rewritten in t = 1 / r_eps (so only integer powers of t remain) and e = eps.
    """
    t_sym, e_sym = sp.Symbol("t", positive=True), sp.Symbol("e", positive=True)
    ready = [sp.expand(sp.simplify(ex).subs(eps, e_sym).subs(s, 1 / t_sym)) for ex in exprs]
    reps, reduced = sp.cse(ready, symbols=sp.numbered_symbols(prefix))
    pad = " " * indent
    lines = [f"{pad}{sym} = {sp.pycode(val, fully_qualified_modules=False)}" for sym, val in reps]
    lines += [f"{pad}{n} = {sp.pycode(v, fully_qualified_modules=False)}" for n, v in zip(names, reduced)]
    return "\n".join(lines)


def _profile_exprs():
    A, B = grab_profiles()
    P, Q, S = affine_profiles()
    grab_u = [A, B]
    grab_j = [A, B, _d_over_s(A), _d_over_s(B)]
    aff_u = [P, Q, S]
    aff_j = [P, Q, S, _d_over_s(P), _d_over_s(Q), _d_over_s(S)]
    return grab_u, grab_j, aff_u, aff_j


def _handle_exprs():
    """Profiles of the handles' fields: force (A, B) and twist (G), and their derivative terms."""
    A, B = grab_profiles()
    G = twist_profile()
    return [A, B, G], [A, B, _d_over_s(A), _d_over_s(B), G, _d_over_s(G)]


def _radii_block(K, cse_text, profiles, totals, indent, radius="e_{k}"):
    """The per-radius profile sums, unrolled over K radii (lets LLVM vectorize the point loop).

    `radius` is the expression of radius k (``e_{k}`` a hoisted scalar, ``eps[j, {k}]`` per handle).
    """
    pad = " " * indent
    lines = [f"{pad}{tot} = 0.0" for tot in totals]
    for k in range(K):
        lines.append(f"{pad}e = {radius.format(k=k)}")
        lines.append(f"{pad}t = 1.0 / math.sqrt(rr + e * e)")
        lines.append(cse_text)
        lines += [f"{pad}{tot} += w_{k} * {prof}" for tot, prof in zip(totals, profiles)]
    return "\n".join(lines)


_NUMBA_BODIES = {
    "grab_displacement": ("grab_u", ["pa", "pb"], ["ta", "tb"], """\
    def grab_displacement_{K}(points, center, move, eps, w, beta, out):
        n = points.shape[0]
        m0, m1, m2 = move[0], move[1], move[2]
        c0, c1, c2 = center[0], center[1], center[2]
{radii_setup}
        for i in numba.prange(n):
            r0 = points[i, 0] - c0
            r1 = points[i, 1] - c1
            r2 = points[i, 2] - c2
            rr = r0 * r0 + r1 * r1 + r2 * r2
{radii}
            rm = (r0 * m0 + r1 * m1 + r2 * m2) * tb
            out[i, 0] = ta * m0 + rm * r0
            out[i, 1] = ta * m1 + rm * r1
            out[i, 2] = ta * m2 + rm * r2
        return out
"""),
    "grab_jacobian": ("grab_j", ["pa", "pb", "pda", "pdb"], ["ta", "tb", "tda", "tdb"], """\
    def grab_jacobian_{K}(points, center, move, eps, w, beta, out):
        n = points.shape[0]
{radii_setup}
        for i in numba.prange(n):
            r = np.empty(3)
            r[0] = points[i, 0] - center[0]
            r[1] = points[i, 1] - center[1]
            r[2] = points[i, 2] - center[2]
            rr = r[0] * r[0] + r[1] * r[1] + r[2] * r[2]
{radii}
            rm = r[0] * move[0] + r[1] * move[1] + r[2] * move[2]
            for a in range(3):
                for l in range(3):
                    v = tda * move[a] * r[l] + tb * move[l] * r[a] + tdb * rm * r[a] * r[l]
                    if a == l:
                        v += tb * rm
                    out[i, a, l] = v
        return out
"""),
    "affine_displacement": ("affine_u", ["pp", "pq", "ps"], ["tp", "tq", "ts"], """\
    def affine_displacement_{K}(points, center, F, eps, w, beta, out):
        n = points.shape[0]
        tr = F[0, 0] + F[1, 1] + F[2, 2]
        c0, c1, c2 = center[0], center[1], center[2]
        F00, F01, F02 = F[0, 0], F[0, 1], F[0, 2]
        F10, F11, F12 = F[1, 0], F[1, 1], F[1, 2]
        F20, F21, F22 = F[2, 0], F[2, 1], F[2, 2]
{radii_setup}
        for i in numba.prange(n):
            r0 = points[i, 0] - c0
            r1 = points[i, 1] - c1
            r2 = points[i, 2] - c2
            rr = r0 * r0 + r1 * r1 + r2 * r2
{radii}
            f0 = F00 * r0 + F01 * r1 + F02 * r2
            f1 = F10 * r0 + F11 * r1 + F12 * r2
            f2 = F20 * r0 + F21 * r1 + F22 * r2
            g0 = F00 * r0 + F10 * r1 + F20 * r2 + tr * r0
            g1 = F01 * r0 + F11 * r1 + F21 * r2 + tr * r1
            g2 = F02 * r0 + F12 * r1 + F22 * r2 + tr * r2
            rfr = (r0 * f0 + r1 * f1 + r2 * f2) * ts
            out[i, 0] = tp * f0 + tq * g0 + rfr * r0
            out[i, 1] = tp * f1 + tq * g1 + rfr * r1
            out[i, 2] = tp * f2 + tq * g2 + rfr * r2
        return out
"""),
    "affine_jacobian": ("affine_j", ["pp", "pq", "ps", "pdp", "pdq", "pds"], ["tp", "tq", "ts", "tdp", "tdq", "tds"], """\
    def affine_jacobian_{K}(points, center, F, eps, w, beta, out):
        n = points.shape[0]
        tr = F[0, 0] + F[1, 1] + F[2, 2]
{radii_setup}
        for i in numba.prange(n):
            r = np.empty(3)
            fr = np.empty(3)
            gr = np.empty(3)
            r[0] = points[i, 0] - center[0]
            r[1] = points[i, 1] - center[1]
            r[2] = points[i, 2] - center[2]
            rr = r[0] * r[0] + r[1] * r[1] + r[2] * r[2]
{radii}
            for a in range(3):
                fr[a] = F[a, 0] * r[0] + F[a, 1] * r[1] + F[a, 2] * r[2]
                gr[a] = F[0, a] * r[0] + F[1, a] * r[1] + F[2, a] * r[2]
            rfr = r[0] * fr[0] + r[1] * fr[1] + r[2] * fr[2]
            for a in range(3):
                lead = tdp * fr[a] + tdq * (gr[a] + tr * r[a]) + tds * rfr * r[a]
                for l in range(3):
                    v = tp * F[a, l] + tq * F[l, a] + ts * r[a] * (fr[l] + gr[l]) + lead * r[l]
                    if a == l:
                        v += tq * tr + ts * rfr
                    out[i, a, l] = v
        return out
"""),
}


#: Points per block of the handles kernel: the block's sums stay in cache while each handle's
#: loop over the block vectorizes (one pass over memory, as for a single brush).
HANDLES_BLOCK = 512

_HANDLES_BODY = """\
    def handles_displacement_{K}(points, centers, forces, torques, eps, w, beta, out):
        n = points.shape[0]
        k = centers.shape[0]
{radii_setup}
        size = {BLOCK}
        for b in numba.prange((n + size - 1) // size):
            start = b * size
            m = min(n, start + size) - start
            u0 = np.zeros(size)
            u1 = np.zeros(size)
            u2 = np.zeros(size)
            for j in range(k):
                c0, c1, c2 = centers[j, 0], centers[j, 1], centers[j, 2]
                f0, f1, f2 = forces[j, 0], forces[j, 1], forces[j, 2]
                q0, q1, q2 = torques[j, 0], torques[j, 1], torques[j, 2]
                for i in range(m):
                    r0 = points[start + i, 0] - c0
                    r1 = points[start + i, 1] - c1
                    r2 = points[start + i, 2] - c2
                    rr = r0 * r0 + r1 * r1 + r2 * r2
{radii}
                    rm = (r0 * f0 + r1 * f1 + r2 * f2) * tb
                    u0[i] += ta * f0 + rm * r0 + tg * (q1 * r2 - q2 * r1)
                    u1[i] += ta * f1 + rm * r1 + tg * (q2 * r0 - q0 * r2)
                    u2[i] += ta * f2 + rm * r2 + tg * (q0 * r1 - q1 * r0)
            for i in range(m):
                out[start + i, 0] = u0[i]
                out[start + i, 1] = u1[i]
                out[start + i, 2] = u2[i]
        return out
"""


def _numba_kernels():
    grab_u, grab_j, aff_u, aff_j = _profile_exprs()
    cse = {
        "grab_u": _cse_block(grab_u, ["pa", "pb"], 12, "g"),
        "grab_j": _cse_block(grab_j, ["pa", "pb", "pda", "pdb"], 12, "g"),
        "affine_u": _cse_block(aff_u, ["pp", "pq", "ps"], 12, "h"),
        "affine_j": _cse_block(aff_j, ["pp", "pq", "ps", "pdp", "pdq", "pds"], 12, "h"),
    }
    counts = sorted({len(r) for r in FALLOFF_RATIOS.values()})
    funcs = []
    names = []
    for name, (which, profs, tots, body) in _NUMBA_BODIES.items():
        for K in counts:
            setup = "\n".join(f"        e_{k} = eps[{k}]\n        w_{k} = w[{k}]" for k in range(K))
            text = body.replace("{K}", str(K)).replace("{radii_setup}", setup).replace(
                "{radii}", _radii_block(K, cse[which], profs, tots, 12))
            funcs.append("    @numba.njit(**opts)\n" + text)
            names.append(f"    ({name!r}, {K}): {name}_{K},")
    # one loop for every handle, twist load or none: a second, force-only loop behind a branch
    # ran 1.7x slower than this one with zero twist loads (measured with numba 0.68)
    handle_u = _cse_block(_handle_exprs()[0], ["pa", "pb", "pg"], 20, "g")
    for K in counts:
        setup = "\n".join(f"        w_{k} = w[{k}]" for k in range(K))
        text = _HANDLES_BODY.replace("{K}", str(K)).replace("{radii_setup}", setup).replace(
            "{BLOCK}", str(HANDLES_BLOCK)).replace(
            "{radii}", _radii_block(K, handle_u, ["pa", "pb", "pg"], ["ta", "tb", "tg"], 20, "eps[j, {k}]"))
        funcs.append("    @numba.njit(**opts)\n" + text)
        names.append(f"    ('handles_displacement', {K}): handles_displacement_{K},")
    return ("\n\ndef _numba_kernels():\n"
            '    """Compile the numba backend: parallel loops over points, radii unrolled per falloff."""\n'
            "    import numba\n\n"
            "    opts = dict(parallel=True, cache=True, fastmath=True, nogil=True)\n\n"
            + "\n".join(funcs) + "\n    return {\n" + "\n".join(names) + "\n    }\n")


def _numpy_kernels():
    grab_u, grab_j, aff_u, aff_j = _profile_exprs()
    gu = _cse_block(grab_u, ["pa", "pb"], 12, "g")
    gj = _cse_block(grab_j, ["pa", "pb", "pda", "pdb"], 12, "g")
    au = _cse_block(aff_u, ["pp", "pq", "ps"], 12, "h")
    aj = _cse_block(aff_j, ["pp", "pq", "ps", "pdp", "pdq", "pds"], 12, "h")
    hu = _cse_block(_handle_exprs()[0], ["pa", "pb", "pg"], 12, "g")
    hj = _cse_block(_handle_exprs()[1], ["pa", "pb", "pda", "pdb", "pg", "pdg"], 12, "g")
    fix = lambda t: t.replace("math.sqrt", "np.sqrt")  # noqa: E731
    return f'''

def _profiles_sum(rr, eps, w, beta, which):
    """Weighted sums over radii of the named profiles, vectorized over rr = |r|^2."""
    totals = None
    for k in range(eps.shape[0]):
        e = float(eps[k])
        t = 1.0 / np.sqrt(rr + e * e)
        if which == "grab_u":
{fix(gu)}
            vals = (pa, pb)
        elif which == "grab_j":
{fix(gj)}
            vals = (pa, pb, pda, pdb)
        elif which == "affine_u":
{fix(au)}
            vals = (pp, pq, ps)
        elif which == "affine_j":
{fix(aj)}
            vals = (pp, pq, ps, pdp, pdq, pds)
        elif which == "handle_u":
{fix(hu)}
            vals = (pa, pb, pg)
        elif which == "handle_j":
{fix(hj)}
            vals = (pa, pb, pda, pdb, pg, pdg)
        else:
            raise ValueError(f"which: unknown profile set {{which!r}}")
        vals = [w[k] * v for v in vals]
        totals = vals if totals is None else [acc + v for acc, v in zip(totals, vals)]
    return totals


def np_grab_displacement(points, center, move, eps, w, beta, out):
    r = np.subtract(points, center, dtype=np.float64)
    rr = np.einsum("ij,ij->i", r, r)
    ta, tb = _profiles_sum(rr, eps, w, beta, "grab_u")
    rm = (r @ move) * tb
    np.multiply(ta[:, None], move[None, :], out=out)
    out += rm[:, None] * r
    return out


def np_grab_jacobian(points, center, move, eps, w, beta, out):
    r = np.subtract(points, center, dtype=np.float64)
    rr = np.einsum("ij,ij->i", r, r)
    ta, tb, tda, tdb = _profiles_sum(rr, eps, w, beta, "grab_j")
    rm = r @ move
    out[...] = (tda[:, None, None] * move[None, :, None] * r[:, None, :]
                + tb[:, None, None] * (r[:, :, None] * move[None, None, :] + rm[:, None, None] * np.eye(3))
                + (tdb * rm)[:, None, None] * r[:, :, None] * r[:, None, :])
    return out


def np_affine_displacement(points, center, F, eps, w, beta, out):
    r = np.subtract(points, center, dtype=np.float64)
    rr = np.einsum("ij,ij->i", r, r)
    tp, tq, ts = _profiles_sum(rr, eps, w, beta, "affine_u")
    tr = np.trace(F)
    fr = r @ F.T
    gr = r @ F + tr * r
    rfr = np.einsum("ij,ij->i", r, fr) * ts
    out[...] = tp[:, None] * fr + tq[:, None] * gr + rfr[:, None] * r
    return out


def np_affine_jacobian(points, center, F, eps, w, beta, out):
    r = np.subtract(points, center, dtype=np.float64)
    rr = np.einsum("ij,ij->i", r, r)
    tp, tq, ts, tdp, tdq, tds = _profiles_sum(rr, eps, w, beta, "affine_j")
    tr = np.trace(F)
    fr = r @ F.T
    gr = r @ F
    rfr = np.einsum("ij,ij->i", r, fr)
    lead = tdp[:, None] * fr + tdq[:, None] * (gr + tr * r) + (tds * rfr)[:, None] * r
    out[...] = (tp[:, None, None] * F[None] + tq[:, None, None] * (F.T + tr * np.eye(3))[None]
                + ts[:, None, None] * (rfr[:, None, None] * np.eye(3) + r[:, :, None] * (fr + gr)[:, None, :])
                + lead[:, :, None] * r[:, None, :])
    return out


def np_handles_displacement(points, centers, forces, torques, eps, w, beta, out):
    out[...] = 0.0
    for j in range(centers.shape[0]):
        r = np.subtract(points, centers[j], dtype=np.float64)
        rr = np.einsum("ij,ij->i", r, r)
        ta, tb, tg = _profiles_sum(rr, eps[j], w, beta, "handle_u")
        out += ta[:, None] * forces[j][None, :] + ((r @ forces[j]) * tb)[:, None] * r
        if np.any(torques[j]):
            out += tg[:, None] * np.cross(torques[j], r)
    return out
'''


def _constants_block():
    c = center_constants()
    lines = ["", "", "# Centre constants per unit a, functions of a radius e and beta (see derive.center_constants)."]
    for k, v in c.items():
        lines.append(f"def center_{k}(e, beta):")
        lines.append(f"    return {sp.pycode(sp.simplify(v.subs(eps, sp.Symbol('e', positive=True))))}")
        lines.append("")
    lines.append("")
    lines.append("#: Relative radii and far-field-cancelling weights of each falloff (derive.multiscale_weights).")
    lines.append("FALLOFFS = {")
    for name, ratios in FALLOFF_RATIOS.items():
        w = multiscale_weights(ratios)
        lines.append(f"    {name!r}: ({tuple(float(q) for q in ratios)!r}, {tuple(float(v) for v in w)!r}),")
    lines.append("}")
    lines.append("")
    lines.append("#: Poisson's ratios at which the gradient bounds are tabulated.")
    lines.append(f"BOUND_NUS = {tuple(float(v) for v in BOUND_NUS)!r}")
    lines.append("")
    for kind in ("grab", "twist"):
        lines.append(f"def envelope_terms_{kind}(e, beta):")
        lines.append(f'    """(p, q, c) of each monomial c rho^p t^q of the {kind} gradient envelope, per unit a, '
                     'for a kernel of radius e (derive.gradient_envelopes)."""')
        e_sym = sp.Symbol("e", positive=True)
        terms = ", ".join(f"({p}, {q}, {sp.pycode(c.subs(eps, e_sym), fully_qualified_modules=False)})"
                          for p, q, c in envelope_terms(kind))
        lines.append(f"    return ({terms})")
        lines.append("")
    lines.append("")
    lines.append("#: Distances (radii) of RADIAL_BOUNDS (derive.RADIAL_GRID).")
    lines.append(f"RADIAL_GRID = {RADIAL_GRID!r}")
    lines.append("")
    lines.append("#: Largest ||J||_2 over directions at each distance of RADIAL_GRID for the unit grab (one row per")
    lines.append("#: nu of BOUND_NUS) and twist (one row), 2% margin, rounded up (derive.radial_bounds).")
    lines.append("RADIAL_BOUNDS = {")
    for kind, per in radial_bounds().items():
        lines.append(f"    {kind!r}: {{")
        for falloff, rows in per.items():
            lines.append(f"        {falloff!r}: (")
            for row in rows:
                lines.append(f"            {row!r},")
            lines.append("        ),")
        lines.append("    },")
    lines.append("}")
    lines.append("")
    lines.append("#: sup over space of the unit kernels' gradient norm (radius 1, unit strength), 1% margin.")
    lines.append("GRADIENT_BOUNDS = {")
    for kind, per in gradient_bounds().items():
        lines.append(f"    {kind!r}: {{")
        for falloff, vals in per.items():
            lines.append(f"        {falloff!r}: {tuple(vals)!r},")
        lines.append("    },")
    lines.append("}")
    return "\n".join(lines) + "\n"


def generate():
    """The full text of `_generated.py`."""
    return HEADER + _constants_block() + _numpy_kernels() + _numba_kernels()


PROOFS = {
    "load density integrates to 1": prove_density_integral,
    "grab solves Navier-Cauchy": prove_grab,
    "affine loads solve Navier-Cauchy": prove_affine,
    "closed-form Jacobians": prove_jacobians,
    "incompressible at nu = 1/2": prove_incompressible,
    "centre constants": prove_center_constants,
    "handle solve identities": prove_handle_terms,
    "gradient envelope peaks": prove_envelope_peaks,
}


def run_proofs(verbose=True):
    ok = True
    for name, fn in PROOFS.items():
        t = time.perf_counter()
        res = fn()
        ok &= bool(res)
        if verbose:
            print(f"  {'ok ' if res else 'FAIL'} {name} ({time.perf_counter() - t:.1f} s)")
    for falloff, ratios in FALLOFF_RATIOS.items():
        t = time.perf_counter()
        res = prove_far_field(ratios, multiscale_weights(ratios))
        ok &= bool(res)
        if verbose:
            print(f"  {'ok ' if res else 'FAIL'} far field of {falloff!r} decays as r^-{2 * len(ratios) - 1} "
                  f"({time.perf_counter() - t:.1f} s)")
    return ok


def publish(path, text, *, write, proved, program, t0, verbose=True):
    """Write a generator's `text` to `path` (write=True, only when every proof held; through a
    temporary file, so a stopped run leaves the old file whole) or compare it with the file there.

    Prints one line (`verbose`), with the seconds since `t0`. Returns True on success: written,
    or proved and the same as the committed file. Every generator ends with this.
    """
    name = os.path.basename(path)
    if write:
        if not proved:
            print(f"{program}: a proof failed; {name} not written", file=sys.stderr)
            return False
        tmp = path + ".tmp"
        with open(tmp, "w", encoding="utf-8") as fh:
            fh.write(text)
        os.replace(tmp, path)
        if verbose:
            print(f"wrote {name} ({time.perf_counter() - t0:.1f} s)")
        return True
    try:
        with open(path, encoding="utf-8") as fh:
            current = fh.read()
    except OSError:
        current = None
    same = current == text
    if verbose:
        print(f"generated code {'matches' if same else 'DIFFERS FROM'} {name} ({time.perf_counter() - t0:.1f} s)")
    return proved and same


def kernels_path():
    return os.path.join(os.path.dirname(os.path.abspath(__file__)), "_generated.py")


def main(argv=None):
    parser = argparse.ArgumentParser(prog="python -m brushes.kernels.derive",
                                     description="Derive, prove and generate pliant's brush kernels.")
    group = parser.add_mutually_exclusive_group(required=True)
    group.add_argument("--check", action="store_true", help="re-derive and prove; fail if _generated.py differs")
    group.add_argument("--write", action="store_true", help="re-derive, prove and write _generated.py")
    args = parser.parse_args(argv)
    t0 = time.perf_counter()
    print("proofs:")
    ok = run_proofs()
    return 0 if publish(kernels_path(), generate(), write=args.write, proved=ok, program="derive", t0=t0) else 1


if __name__ == "__main__":
    sys.exit(main())
