"""Derivation of pliant's elastodynamic brush kernels, their proofs, and the generator of
`_dynamic_generated.py`.

This is the source of truth for the secondary-motion formulas. It follows F. de Goes and
D. L. James, "Dynamic Kelvinlets: Secondary Motions based on Fundamental Solutions of
Elastodynamics", ACM Trans. Graph. 37(4), 2018 ([dGJ18] below), but every formula is derived
here again from the static brushes of `derive.py` ([dGJ17]).

The problem. An infinite homogeneous, isotropic elastic body (density rho, Lame constants
lambda, mu) at rest until t = 0 carries the brush's regularized load b(x, t) = rho_eps(r) f L(t)
(the affine brushes: its gradient contracted with a 3x3 load F), L = H (step), delta (impulse)
or the unit ramp t H(t). The displacement solves the elastodynamic Navier equations

    rho u_tt = mu lap u + (lambda + mu) grad div u + b,        u = u_t = 0 for t < 0,

with pressure speed alpha^2 = (lambda + 2 mu) / rho and shear speed beta^2 = mu / rho.

Steps of the derivation (each a proof in `PROOFS`):

1. Helmholtz split of the load. rho_eps = lap g with the closed-form Newtonian potential
   g(r) = -(1 / 4 pi) (1 / s + eps^2 / (2 s^3)), s = sqrt(r^2 + eps^2), so
   rho_eps f = grad div(g f) - curl curl(g f).
2. Potentials. With u = grad div(phi f) - curl curl(psi f), the Navier equations hold when the
   scalars solve rho phi_tt = (lambda + 2 mu) lap phi + g L and rho psi_tt = mu lap psi + g L
   (an identity for any phi, psi). The pressure part grad div(phi f) is curl-free and travels at
   alpha; the shear part is divergence-free and travels at beta.
3. Retarded forms. For a radial source the 3D wave equation reduces to a 1D one for r phi.
   With the antiderivatives G1' = xi g(xi), G2' = G1, G3' = G2 (all elementary:
   G2(xi) = -xi sqrt(xi^2 + eps^2) / (8 pi)), the step solution is phi = W / (2 rho c^2) with
   r W = G2(r + c t) + G2(r - c t) - 2 G2(r) (Duhamel's principle on d'Alembert's solution of the
   odd extension; the same as Kirchhoff's spherical means). The impulse is its time derivative,
   the ramp its time integral.
4. Symmetric form. With S+- = sqrt((r +- T)^2 + eps^2), T = c t, sigma = S+ + S- and
   pi = S+ S-, every W is a rational function of sigma, pi, s, r^2, T and eps^2, e.g.
   W_step = -(sigma + 4 T^2 / sigma) / (8 pi) + s / (4 pi): a wave part (sigma and pi only) plus
   m_n s / (4 pi) with m = 0, 1, T for impulse, step, ramp. The radial derivative
   Dr = (1/r) d/dr maps such functions to such functions (Dr sigma = (sigma^2 - 4 T^2) /
   (sigma pi), Dr pi = 2 (r^2 - T^2 + eps^2) / pi), so no 1/r is left to cancel at the centre.
5. Profiles. Per unit a = 1 / (4 pi mu), like the static kernels, the grab field is
   u = [A I + B r r^T] f with
       A = kappa c_p^(2-n) 2 pi D1[T_p] + c_s^(2-n) 2 pi (2 D1 + r^2 D2)[T_s],
       B = kappa c_p^(2-n) 2 pi D2[T_p] - c_s^(2-n) 2 pi D2[T_s],
   D_k = Dr^k Phi_n, Phi_n = W_n / c^(2-n) (n = 1 impulse, 2 step, 3 ramp), T_p = alpha t,
   T_s = beta t, kappa = beta^2 / alpha^2 = (1 - 2 nu) / (2 (1 - nu)). The affine brushes use
   P = Dr A, Q = B, S = Dr B in the static template P F r + Q (F^T r + tr F r) + S (r.F r) r.
   The static parts of both waves add up to m_n(t) times the static regularized Kelvinlet of
   `derive.py`, so the generated code evaluates that once and the wave parts per front.
6. Limits. As t -> oo the wave parts die away, so the step settles to the static regularized
   Kelvinlet (every brush to its static displacement, with the same normalization) and the
   impulse to 0. At Poisson's ratio 1/2 kappa = 0: the pressure part is balanced at once by a
   pressure p = L(t) f . grad g and leaves no displacement; the field is the shear part alone,
   divergence-free, and solves rho u_tt = mu lap u - grad p + b.
7. End to end, the generated expressions themselves are checked exactly at rational points
   (where every square root is rational) against each wave's equation, for every level, both
   parts, and grab, twist, scale and pinch loads.

Falloffs are weighted sums over radii (`_generated.FALLOFFS`); the equations are linear, so each
radius solves them under its own load and the sum under the summed load.

Run ``python -m brushes.kernels.dynamic_derive --write`` to regenerate `_dynamic_generated.py`;
``--check`` (also run by ``python -m brushes.kernels.generate --check``) re-derives everything in
memory, re-runs every proof and fails if the committed file differs.
"""
from __future__ import annotations

import argparse
import functools
import inspect
import os
import sys
import time
from fractions import Fraction

import sympy as sp

from brushes.kernels import derive

# ---------------------------------------------------------------------------------------------
# Symbols
# ---------------------------------------------------------------------------------------------
x, y, z = derive.x, derive.y, derive.z
X = derive.X
eps = derive.eps
r = sp.Symbol("r", positive=True)          # |x - center|
xi = sp.Symbol("xi", real=True)            # argument of the antiderivatives
T = sp.Symbol("T", positive=True)          # c t, the distance a front has travelled
t = sp.Symbol("t", positive=True)          # time
c = sp.Symbol("c", positive=True)          # a wave speed
rho, mu = sp.symbols("rho mu", positive=True)
# the symmetric variables of step 4, and the square roots they are built from
sig, pi_, s0, r2 = sp.symbols("sig pi_ s0 rr", positive=True)
Sp, Sm = sp.symbols("S_p S_m", positive=True)
# the inverses the generated code computes (one division per term)
isig, ipi, is0 = sp.symbols("isig ipi is0", positive=True)

LEVELS = ("impulse", "step", "ramp")       # n = 1, 2, 3: W_n = c^(2 - n) Phi_n(r, T)
PARTS = ("pressure", "shear")


def newton_potential(sv=None):
    """g with lap g = rho_eps: -(1 / 4 pi) (1 / s + eps^2 / (2 s^3)), in s (default `s0`)."""
    sv = s0 if sv is None else sv
    return -(1 / sv + eps**2 / (2 * sv**3)) / (4 * sp.pi)


def antiderivatives():
    """(G1, G2, G3) in xi: G1' = xi g(sqrt(xi^2 + eps^2)), G2' = G1, G3' = G2."""
    S = sp.sqrt(xi**2 + eps**2)
    G1 = -(2 * S - eps**2 / S) / (8 * sp.pi)
    G2 = -xi * S / (8 * sp.pi)
    G3 = -S**3 / (24 * sp.pi)
    return G1, G2, G3


def _direct_step_potential():
    """W_step(r, T) = [G2(r + T) + G2(r - T) - 2 G2(r)] / r, straight from step 3."""
    _, G2, _ = antiderivatives()
    return (G2.subs(xi, r + T) + G2.subs(xi, r - T) - 2 * G2.subs(xi, r)) / r


# ---------------------------------------------------------------------------------------------
# The symmetric algebra of step 4
# ---------------------------------------------------------------------------------------------
def Dr(E):
    """(1/r) d/dr of E(sigma, pi, s0, r2, T, eps) by the chain rule (proved in `prove_chain_rules`)."""
    return (sp.diff(E, sig) * (sig**2 - 4 * T**2) / (sig * pi_)
            + sp.diff(E, pi_) * 2 * (r2 - T**2 + eps**2) / pi_
            + sp.diff(E, s0) / s0 + 2 * sp.diff(E, r2))


def DT(E):
    """d/dT of E(sigma, pi, s0, r2, T, eps) by the chain rule (proved in `prove_chain_rules`)."""
    return (sp.diff(E, sig) * T * (sig**2 - 4 * r2) / (sig * pi_)
            + sp.diff(E, pi_) * 2 * T * (T**2 - r2 + eps**2) / pi_
            + sp.diff(E, T))


#: The static potential: W_step tends to it (up to a constant in r) as t -> oo.
STATIC_POTENTIAL = s0 / (4 * sp.pi)


def static_multiplier(level):
    """m_n with Phi_n = wave part + m_n STATIC_POTENTIAL: 0 (impulse), 1 (step), T (ramp)."""
    return {"impulse": sp.Integer(0), "step": sp.Integer(1), "ramp": T}[level]


def wave_potentials():
    """{level: the wave part of Phi_n}: the part that travels (sigma and pi only, no s0)."""
    return {"impulse": -(4 * T / sig) * (2 + eps**2 / pi_) / (8 * sp.pi),
            "step": -(sig + 4 * T**2 / sig) / (8 * sp.pi),
            "ramp": -T * (sig**2 - pi_) / (6 * sp.pi * sig)}


def potentials():
    """{level: Phi_n} in the symmetric variables, with W_n = c^(2 - n) Phi_n.

    impulse: d/dt W_step = c dPhi_step/dT; step: W_step; ramp: int_0^t W_step = (1/c) Phi_ramp.
    Each is its wave part plus m_n s0 / (4 pi) (`static_multiplier`).
    """
    return {k: v + static_multiplier(k) * STATIC_POTENTIAL for k, v in wave_potentials().items()}


def _relations():
    """sigma, pi and s0 are algebraic over Q(r^2, T, eps): their defining relations."""
    q = r2 + T**2 + eps**2
    return [sig**2 - 2 * q - 2 * pi_, pi_**2 - (q**2 - 4 * r2 * T**2), s0**2 - r2 - eps**2]


def _is_zero_symmetric(E):
    """True if E(sigma, pi, s0, r2, T, eps) vanishes identically.

    The numerator is reduced modulo the three relations (a Groebner basis: their leading
    monomials sigma^2, pi^2, s0^2 are coprime). {1, sigma, pi, sigma pi} x {1, s0} is a basis of
    the field extension (S+ and S- are independent square roots for r T != 0, and s0 is
    independent of both), so E = 0 exactly when the remainder is the zero polynomial.
    """
    num, _ = sp.fraction(sp.together(E))
    _, rem = sp.reduced(sp.expand(num), _relations(), sig, pi_, s0)
    return sp.expand(rem) == 0


def _is_zero_roots(E):
    """True if E(S+, S-, s0, r, T, eps), with explicit r allowed, vanishes identically.

    Reduced modulo S+^2 = (r + T)^2 + eps^2, S-^2 = (r - T)^2 + eps^2, s0^2 = r^2 + eps^2; the
    eight products of the three independent square roots form a basis, so a zero remainder is
    the same as E = 0.
    """
    num, _ = sp.fraction(sp.together(E))
    rels = [Sp**2 - (r + T) ** 2 - eps**2, Sm**2 - (r - T) ** 2 - eps**2, s0**2 - r**2 - eps**2]
    _, rem = sp.reduced(sp.expand(num), rels, Sp, Sm, s0)
    return sp.expand(rem) == 0


def _in_roots(E):
    """E(sigma, pi, s0, r2, T) written with S+, S- and explicit r."""
    return E.subs({sig: Sp + Sm, pi_: Sp * Sm, r2: r**2})


def _roots_dr(E):
    """d/dr of E(S+, S-, s0, r, T) by the plain chain rule."""
    return (sp.diff(E, r) + sp.diff(E, Sp) * (r + T) / Sp + sp.diff(E, Sm) * (r - T) / Sm
            + sp.diff(E, s0) * r / s0)


def _roots_dT(E):
    return sp.diff(E, T) + sp.diff(E, Sp) * (r + T) / Sp + sp.diff(E, Sm) * (T - r) / Sm


@functools.lru_cache(maxsize=None)
def radial_derivatives(level):
    """(D1, D2, D3) = Dr^k of the wave part of Phi_level, k = 1, 2, 3, factored."""
    out = []
    E = wave_potentials()[level]
    for _ in range(3):
        E = sp.factor(sp.together(Dr(E)))
        out.append(E)
    return tuple(out)


def assemble(D1, D2, D3, part, kind):
    """The profiles of step 5 from D_k = Dr^k Phi (per unit a, c^(2-n), and kappa for the
    pressure part). kind "grab": (A, B) of u = [A I + B r r^T] f; kind "affine": (P, Q, S) of
    u = P F r + Q (F^T r + tr F r) + S (r.F r) r, with P = Dr A, Q = B, S = Dr B."""
    k = 2 * sp.pi
    if part == "pressure":   # 2 pi grad div(Phi f)
        return (k * D1, k * D2) if kind == "grab" else (k * D2, k * D2, k * D3)
    # shear: -2 pi curl curl(Phi f) = 2 pi [lap Phi f - grad div(Phi f)], lap = 3 Dr + r^2 Dr^2
    return (k * (2 * D1 + r2 * D2), -k * D2) if kind == "grab" else (k * (4 * D2 + r2 * D3), -k * D2, -k * D3)


def static_derivatives():
    """Dr^k (s0 / 4 pi), k = 1, 2, 3 (proved in `prove_levels`)."""
    return (1 / (4 * sp.pi * s0), -1 / (4 * sp.pi * s0**3), 3 / (4 * sp.pi * s0**5))


def _normal_form(E):
    """E with its numerator reduced modulo the relations of sigma and pi (an equal expression)."""
    num, den = sp.fraction(sp.together(E))
    _, rem = sp.reduced(sp.expand(num), _relations()[:2], sig, pi_)
    return sp.factor(rem) / sp.factor(den)


@functools.lru_cache(maxsize=None)
def profiles(level, part, kind):
    """The emitted wave profiles (see `assemble`) as functions of sigma, pi, r2, T, eps: of two
    equal forms (factored, or its numerator reduced modulo the relations sigma and pi satisfy,
    which changes the polynomial by a multiple of expressions that vanish) the one with fewer
    operations. `prove_fields_at_rational_points` checks the chosen forms themselves."""
    out = []
    for e in assemble(*radial_derivatives(level), part, kind):
        forms = [sp.factor(sp.together(e)), _normal_form(e)]
        out.append(min(forms, key=sp.count_ops))
    return tuple(out)


def static_part(level, part, kind):
    """The part's static profiles m_n assemble(Dr^k s0 / 4 pi): functions of s0, r2, T, eps."""
    m = static_multiplier(level)
    return tuple(sp.factor(m * e) for e in assemble(*static_derivatives(), part, kind))


def static_profiles(kind):
    """The static profiles of `derive.py` in s0 and beta_k = 1 / (4 (1 - nu))."""
    got = derive.grab_profiles() if kind == "grab" else derive.affine_profiles()
    return tuple(e.subs(derive.s, s0) for e in got)


# ---------------------------------------------------------------------------------------------
# Vector calculus helpers (x, y, z)
# ---------------------------------------------------------------------------------------------
def _grad(q):
    return sp.Matrix([sp.diff(q, v) for v in X])


def _div(u):
    return sum(sp.diff(u[i], X[i]) for i in range(3))


def _curl(u):
    return sp.Matrix([sp.diff(u[2], y) - sp.diff(u[1], z), sp.diff(u[0], z) - sp.diff(u[2], x),
                      sp.diff(u[1], x) - sp.diff(u[0], y)])


def _lap(q):
    return sum(sp.diff(q, v, 2) for v in X)


def _vlap(u):
    return sp.Matrix([_lap(u[i]) for i in range(3)])


# ---------------------------------------------------------------------------------------------
# Proofs
# ---------------------------------------------------------------------------------------------
def prove_newton_potential():
    """lap g = rho_eps of [dGJ17] eq. 8, fully symbolically, and g ~ -1 / (4 pi r) far away."""
    g = newton_potential(derive.r_eps)
    ok = sp.simplify(_lap(g) - derive.load_density()) == 0
    far = sp.limit(newton_potential(sp.sqrt(r**2 + eps**2)) * r, r, sp.oo)
    return ok and sp.simplify(far + 1 / (4 * sp.pi)) == 0


def prove_antiderivatives():
    """G1' = xi g, G2' = G1, G3' = G2 (symbolic in xi); G2 is odd, G1 and G3 even."""
    G1, G2, G3 = antiderivatives()
    g = newton_potential(sp.sqrt(xi**2 + eps**2))
    ok = sp.simplify(sp.diff(G1, xi) - xi * g) == 0
    ok &= sp.simplify(sp.diff(G2, xi) - G1) == 0
    ok &= sp.simplify(sp.diff(G3, xi) - G2) == 0
    ok &= sp.simplify(G2.subs(xi, -xi) + G2) == 0
    ok &= sp.simplify(G1.subs(xi, -xi) - G1) == 0 and sp.simplify(G3.subs(xi, -xi) - G3) == 0
    return ok


def prove_radial_wave():
    """phi = W / (2 rho c^2) solves rho phi_tt = rho c^2 lap phi + g for t > 0 with
    phi = phi_t = 0 at t = 0, and r W is odd in r (so W is smooth at the centre).

    In T = c t: W_TT = (1/r) (r W)_rr + 2 g (the radial Laplacian), symbolic in r and T.
    """
    W = _direct_step_potential()
    rW = sp.expand(r * W)
    g = newton_potential(sp.sqrt(r**2 + eps**2))
    ok = sp.simplify(sp.diff(rW, T, 2) - sp.diff(rW, r, 2) - 2 * r * g) == 0
    ok &= sp.simplify(rW.subs(T, 0)) == 0
    ok &= sp.simplify(sp.diff(rW, T).subs(T, 0)) == 0
    odd = rW.subs(r, -xi) + rW.subs(r, xi)   # r W at -r plus at r
    ok &= sp.simplify(odd) == 0
    return ok


def prove_chain_rules():
    """The symmetric form of W_step equals its direct form, and the chain rules `Dr` and `DT`
    for sigma and pi are right (reduction modulo the square roots' relations: exact)."""
    direct = _direct_step_potential().subs({sp.sqrt((r + T) ** 2 + eps**2): Sp,
                                            sp.sqrt((r - T) ** 2 + eps**2): Sm,
                                            sp.sqrt(r**2 + eps**2): s0})
    ok = _is_zero_roots(_in_roots(potentials()["step"]) - direct)
    for E in (sig, pi_):
        ok &= _is_zero_roots(_in_roots(Dr(E)) - _roots_dr(_in_roots(E)) / r)
        ok &= _is_zero_roots(_in_roots(DT(E)) - _roots_dT(_in_roots(E)))
    ok &= _is_zero_roots(_in_roots(Dr(s0)) - _roots_dr(s0) / r)
    return ok


def prove_code_roots():
    """The generated code's square roots: pi = S+ S- = sqrt((T^2 - r^2)^2 + eps^2 (2 (T^2 + r^2) +
    eps^2)) and sigma = S+ + S- = sqrt(2 (r^2 + T^2 + eps^2 + pi)), both radicands sums of
    non-negative terms and both roots positive, so these are the positive roots."""
    ok = _is_zero_roots((Sp * Sm) ** 2 - ((T**2 - r**2) ** 2 + eps**2 * (2 * (T**2 + r**2) + eps**2)))
    ok &= _is_zero_roots((Sp + Sm) ** 2 - 2 * (r**2 + T**2 + eps**2 + Sp * Sm))
    return ok


def prove_levels():
    """impulse = d/dT step; d/dT ramp = step with ramp = 0 at T = 0; every level is 0 at T = 0."""
    W = potentials()
    ok = _is_zero_symmetric(W["impulse"] - DT(W["step"]))
    ok &= _is_zero_symmetric(DT(W["ramp"]) - W["step"])
    at0 = {T: 0}
    for E in W.values():   # at T = 0, S+ = S- = s0: sigma = 2 s0, pi = s0^2
        ok &= sp.simplify(E.subs(at0).subs({sig: 2 * s0, pi_: s0**2})) == 0
    E = STATIC_POTENTIAL
    for want in static_derivatives():
        E = Dr(E)
        ok &= sp.simplify(E - want) == 0
    return ok


def prove_potential_identity():
    """For any phi, psi (x, y, z, t): with u = grad div(phi f) - curl curl(psi f) and the load
    grad div(g f) - curl curl(g f) = lap(g f),
    rho u_tt - mu lap u - (lambda + mu) grad div u - load
      = grad div(E_phi f) - curl curl(E_psi f),
    E_phi = rho phi_tt - (lambda + 2 mu) lap phi - g, E_psi = rho psi_tt - mu lap psi - g.
    Also div of the shear part and curl of the pressure part vanish, and
    mu lap u + (lambda + mu) grad div u = (lambda + 2 mu) grad div u - mu curl curl u."""
    lam = sp.Symbol("lambda", positive=True)
    f = sp.Matrix(sp.symbols("f1:4", real=True))
    phi = sp.Function("phi")(x, y, z, t)
    psi = sp.Function("psi")(x, y, z, t)
    g = sp.Function("g")(x, y, z)
    gd = lambda q: _grad(_div(q * f))  # noqa: E731
    cc = lambda q: _curl(_curl(q * f))  # noqa: E731
    u = gd(phi) - cc(psi)
    load = gd(g) - cc(g)
    lhs = rho * sp.diff(u, t, 2) - mu * _vlap(u) - (lam + mu) * _grad(_div(u)) - load
    E_phi = rho * sp.diff(phi, t, 2) - (lam + 2 * mu) * _lap(phi) - g
    E_psi = rho * sp.diff(psi, t, 2) - mu * _lap(psi) - g
    rhs = gd(E_phi) - cc(E_psi)
    ok = all(sp.expand(e) == 0 for e in lhs - rhs)
    ok &= all(sp.expand(e) == 0 for e in load - _vlap(g * f))
    ok &= sp.expand(_div(cc(psi))) == 0 and all(sp.expand(e) == 0 for e in _curl(gd(phi)))
    v = sp.Matrix([sp.Function(f"v{i}")(x, y, z) for i in range(3)])
    ok &= all(sp.expand(e) == 0 for e in (mu * _vlap(v) + (lam + mu) * _grad(_div(v)))
              - ((lam + 2 * mu) * _grad(_div(v)) - mu * _curl(_curl(v))))
    return ok


def prove_profile_assembly():
    """For radial phi = W_a / (2 rho alpha^2), psi = W_b / (2 rho beta^2) (any W_a, W_b of r):
    4 pi mu [grad div((phi - psi) f) + lap(psi) f] = [A I + B r r^T] f with the profiles of
    step 5, and the affine contraction sum_jk d_k (A d_ij + B r_i r_j) F_jk is the template
    P F r + Q (F^T r + tr F r) + S (r.F r) r with P = Dr A, Q = B, S = Dr B (any radial A, B)."""
    alpha, beta_s = sp.symbols("alpha beta_s", positive=True)
    rr = sp.sqrt(x**2 + y**2 + z**2)
    Wa, Wb = sp.Function("Wa"), sp.Function("Wb")
    f = sp.Matrix(sp.symbols("f1:4", real=True))
    R = sp.Matrix(X)
    phi = Wa(rr) / (2 * rho * alpha**2)
    psi = Wb(rr) / (2 * rho * beta_s**2)
    u = 4 * sp.pi * rho * beta_s**2 * (_grad(_div((phi - psi) * f)) + _lap(psi) * f)

    def dr_k(W, k):   # Dr^k W for a generic function of r, written with its r-derivatives
        E = W(r)
        for _ in range(k):
            E = sp.diff(E, r) / r
        return E

    kappa = beta_s**2 / alpha**2
    A = 2 * sp.pi * (kappa * dr_k(Wa, 1) + 2 * dr_k(Wb, 1) + r**2 * dr_k(Wb, 2))
    B = 2 * sp.pi * (kappa * dr_k(Wa, 2) - dr_k(Wb, 2))
    tmpl = (A * f + B * (R.T * f)[0] * R).subs(r, rr)
    ok = all(sp.simplify((e1 - e2).doit()) == 0 for e1, e2 in zip(u, tmpl))
    # the pieces 2 pi (D1, D2) and 2 pi (2 D1 + r^2 D2, -D2) of `profiles` are these A and B
    Af, Bf = sp.Function("Af"), sp.Function("Bf")
    F = sp.Matrix(3, 3, sp.symbols("F0:9", real=True))
    K = Af(rr) * sp.eye(3) + Bf(rr) * R * R.T
    ua = sp.Matrix([sum(sp.diff(K[i, j], X[k]) * F[j, k] for j in range(3) for k in range(3))
                    for i in range(3)])
    P = (sp.diff(Af(r), r) / r).subs(r, rr)
    Q = Bf(rr)
    S = (sp.diff(Bf(r), r) / r).subs(r, rr)
    Fr = F * R
    tmpl = P * Fr + Q * (F.T * R + F.trace() * R) + S * (R.T * Fr)[0] * R
    ok &= all(sp.simplify((e1 - e2).doit()) == 0 for e1, e2 in zip(ua, tmpl))
    return ok


#: (|r|, eps) with rational s = sqrt(r^2 + eps^2), for the exact long-time limits.
LIMIT_POINTS = ((sp.Rational(3, 7), sp.Rational(4, 7)), (sp.Rational(12, 5), sp.Integer(1)))


def _limit_at_infinity(E, rv, ev):
    """lim_{T -> oo} of E(sigma, pi, s0, r2, T, eps) at |r| = rv, eps = ev, exactly.

    With u = 1 / T: sigma = (P + M) / u and pi = P M / u^2, where P, M = sqrt(1 +- 2 r u +
    s^2 u^2) are analytic at u = 0 with P(0) = M(0) = 1. E becomes N(u, P, M) / D(u, P, M) with
    polynomials N, D (the number pi is carried as a symbol); with P and M replaced by their
    Taylor polynomials of order K the coefficients of u^0 .. u^K of N and D are exact. The limit
    is read off the lowest order m of D (m <= K is required, else K is doubled): N's order above
    m gives 0, equal gives the ratio of the coefficients, below gives infinity.
    """
    u, P, M, pi_sym = sp.symbols("u P M pi_sym", positive=True)
    sv = sp.sqrt(rv**2 + ev**2)
    full = E.subs(sp.pi, pi_sym).subs({sig: (P + M) / u, pi_: P * M / u**2, T: 1 / u, r2: rv**2, s0: sv, eps: ev})
    num, den = sp.fraction(sp.together(full))
    pn, pd = sp.Poly(num, pi_sym), sp.Poly(den, pi_sym)
    scale = sp.Integer(1)
    if len(pn.terms()) == 1 and len(pd.terms()) == 1:   # pi only as a factor: take it out, work over QQ
        (kn,), cn_ = pn.terms()[0]
        (kd,), cd_ = pd.terms()[0]
        num, den, scale, dom = cn_, cd_, sp.pi ** (kn - kd), sp.QQ
    else:
        dom = sp.QQ[pi_sym]
    num, den = (sp.Poly(sp.expand(q), u, P, M, domain=dom) for q in (num, den))
    K = 4
    while True:
        def series(sign):
            ser = sp.series(sp.sqrt(1 + sign * 2 * rv * u + sv**2 * u**2), u, 0, K + 1).removeO()
            return sp.Poly(ser, u, domain=dom)

        def truncate(q):
            return sp.Poly.from_dict({m: cf for m, cf in q.as_dict().items() if m[0] <= K}, u, domain=dom) \
                if not q.is_zero else q

        Pt, Mt = series(1), series(-1)
        powers = {}

        def power(base, name, k):
            if (name, k) not in powers:
                powers[(name, k)] = sp.Poly(1, u, domain=dom) if k == 0 else truncate(power(base, name, k - 1) * base)
            return powers[(name, k)]

        def lowest(poly):
            total = sp.Poly(0, u, domain=dom)
            for (i, j, k), cf in poly.terms():
                if i <= K:
                    total += truncate(sp.Poly(dom.to_sympy(cf) * u**i, u, domain=dom) * power(Pt, "P", j)
                                      * power(Mt, "M", k))
            for k in range(K + 1):
                value = total.coeff_monomial(u**k)
                if value != 0:
                    return k, value
            return None, 0

        md, cd = lowest(den)
        if md is not None:
            break
        K *= 2
    mn, cn = lowest(num)
    if mn is None or mn > md:
        return sp.Integer(0)
    if mn < md:
        return sp.oo
    return sp.simplify((dom.to_sympy(cn) / dom.to_sympy(cd)).subs(pi_sym, sp.pi) * scale)


def prove_long_time_limit():
    """As t -> oo the wave parts die away: Dr^k of the wave part tends to 0 for the step and the
    impulse, and to a finite limit for the ramp (so the ramped load's difference quotient tends to
    0), exactly at the rational LIMIT_POINTS. What is left is the static part; assembled as in
    step 5 it is, symbolically, the static regularized Kelvinlet of `derive.py` ([dGJ17] eq. 9 and
    its affine derivatives) with beta_k = (1 - kappa) / 2, for grab and affine loads (twist, scale
    and pinch are affine loads), and every falloff's weighted sum is the static falloff brush."""
    kappa = sp.Symbol("kappa", positive=True)
    ok = True
    for rv, ev in LIMIT_POINTS:
        for level in LEVELS:
            for D in radial_derivatives(level):
                got = _limit_at_infinity(D, rv, ev)
                ok &= (got == 0) if level != "ramp" else bool(got.is_finite)
    sv = sp.sqrt(r**2 + eps**2)
    at = {r2: r**2, s0: sv}
    for kind in ("grab", "affine"):
        stat = [e.subs({derive.beta: (1 - kappa) / 2, s0: sv}) for e in static_profiles(kind)]
        lim = [(kappa * a + b).subs(at) for a, b in zip(static_part("step", "pressure", kind),
                                                        static_part("step", "shear", kind))]
        ok &= all(sp.simplify(a - b) == 0 for a, b in zip(lim, stat))
        for ratios in derive.FALLOFF_RATIOS.values():
            w = derive.multiscale_weights(ratios)
            for a, b in zip(lim, stat):
                dyn = sum(wi * a.subs(eps, eps * q) for wi, q in zip(w, ratios))
                sta = sum(wi * b.subs(eps, eps * q) for wi, q in zip(w, ratios))
                ok &= sp.simplify(dyn - sta) == 0
    return ok


def prove_incompressible_limit():
    """Poisson's ratio 1/2 (alpha -> oo, kappa = beta^2 / alpha^2 -> 0).

    For fixed t > 0 the pressure part enters as kappa c_p^(2 - n) Dr^k Phi_n(alpha t): the step's
    Dr^k Phi tends to a finite limit and the impulse's to 0 (see `prove_long_time_limit`), and
    kappa alpha, kappa / alpha -> 0, so the pressure part vanishes for every level. What is left,
    the shear part u = -curl curl(psi f), is divergence-free and (for any psi solving
    rho psi_tt = mu lap psi + g L) solves rho u_tt = mu lap u - grad p + rho_eps f L with the
    pressure p = L f . grad g, which takes up the curl-free part of the load at once.
    """
    alpha, beta_s = sp.symbols("alpha beta_s", positive=True)
    kappa = beta_s**2 / alpha**2
    ok = sp.limit(kappa * alpha, alpha, sp.oo) == 0 and sp.limit(kappa / alpha, alpha, sp.oo) == 0
    ok &= sp.limit(kappa, alpha, sp.oo) == 0
    nu = sp.Symbol("nu", real=True)
    lam = 2 * mu * nu / (1 - 2 * nu)
    ok &= sp.simplify(mu / (lam + 2 * mu) - (1 - 2 * nu) / (2 * (1 - nu))) == 0   # kappa(nu)
    f = sp.Matrix(sp.symbols("f1:4", real=True))
    psi = sp.Function("psi")(x, y, z, t)
    g = sp.Function("g")(x, y, z)
    u = -_curl(_curl(psi * f))
    p = (f.T * _grad(g))[0]
    E_psi = rho * sp.diff(psi, t, 2) - mu * _lap(psi) - g
    res = rho * sp.diff(u, t, 2) - mu * _vlap(u) + _grad(p) - _vlap(g * f)
    ok &= all(sp.expand(e) == 0 for e in res + _curl(_curl(E_psi * f)))
    ok &= sp.expand(_div(u)) == 0
    return ok


# ---------------------------------------------------------------------------------------------
# End-to-end check of the emitted expressions at exact rational points
# ---------------------------------------------------------------------------------------------
#: (eps, |r|, T, (x, y, z)) with |r|, sqrt(r^2 + eps^2) and sqrt((r +- T)^2 + eps^2) all whole
#: numbers, so the fields and their derivatives are exact rationals there (found by search).
#: Both T < |r| (the front has not reached the point) and T > |r| occur.
RATIONAL_POINTS = ((24, 7, 25, (2, 3, 6)), (40, 42, 33, (8, 10, 40)), (80, 39, 21, (2, 19, 34)))
SAMPLE_SPEED = sp.Rational(3, 2)
SAMPLE_LOADS = {
    "grab": sp.Matrix([2, -1, 3]),
    "twist": sp.Matrix([[0, -2, 1], [2, 0, -3], [-1, 3, 0]]),
    "scale": sp.eye(3),
    "pinch": sp.Matrix([[1, 2, 0], [2, -3, 1], [0, 1, 2]]),
}


_MONO = [()] + [(i,) for i in range(4)] + [(i, j) for i in range(4) for j in range(i, 4)]
_MONO_INDEX = {m: k for k, m in enumerate(_MONO)}
_PRODUCTS = [(a, b, _MONO_INDEX[tuple(sorted(_MONO[a] + _MONO[b]))])
             for a in range(15) for b in range(15) if len(_MONO[a]) + len(_MONO[b]) <= 2]


class _Jet:
    """A Taylor polynomial of degree 2 in (dx, dy, dz, dt) with exact rational coefficients.

    Evaluating an expression on jets gives its value and its first and second derivatives at
    a point exactly, without building the (large) symbolic derivatives.
    """

    def __init__(self, coef):
        self.c = coef

    @classmethod
    def const(cls, v):
        return cls([Fraction(v)] + [Fraction(0)] * 14)

    @classmethod
    def var(cls, v, i):
        j = cls.const(v)
        j.c[1 + i] = Fraction(1)
        return j

    def __add__(self, o):
        return _Jet([a + b for a, b in zip(self.c, o.c)])

    def __neg__(self):
        return _Jet([-a for a in self.c])

    def __sub__(self, o):
        return self + (-o)

    def __mul__(self, o):
        out = [Fraction(0)] * 15
        for a, b, k in _PRODUCTS:
            if self.c[a] and o.c[b]:
                out[k] += self.c[a] * o.c[b]
        return _Jet(out)

    def scaled(self, v):
        return _Jet([a * v for a in self.c])

    def _series(self, k0, k1, k2):
        """k0 + k1 d + k2 d^2 with d = self - self(0): a function's second-order Taylor step."""
        d = _Jet([Fraction(0)] + self.c[1:])
        return _Jet.const(k0) + d.scaled(k1) + (d * d).scaled(k2)

    def inverse(self):
        a = self.c[0]
        return self._series(1 / a, -1 / a**2, 1 / a**3)

    def sqrt(self):
        a = self.c[0]
        root = sp.sqrt(sp.Rational(a.numerator, a.denominator))
        if not root.is_Rational:
            raise ValueError("sample point: a square root is not rational")
        q = Fraction(int(root.p), int(root.q))
        return self._series(q, 1 / (2 * q), -1 / (8 * q**3))

    def power(self, e):
        """self**e for an integer or half-integer e."""
        e = sp.Rational(e)
        base = self.sqrt() if e.q == 2 else self
        k = int(e * 2) if e.q == 2 else int(e)
        if k < 0:
            base, k = base.inverse(), -k
        out = _Jet.const(1)
        for _ in range(k):
            out = out * base
        return out

    def second(self, i, j):
        """d^2 / dv_i dv_j at the point."""
        k = _MONO_INDEX[tuple(sorted((i, j)))]
        return self.c[k] * (2 if i == j else 1)


def _evaluate(expr, base, memo):
    """expr (sympy) on jets: `base` maps symbols to jets; pi must have cancelled out."""
    if expr in memo:
        return memo[expr]
    if expr in base:
        out = base[expr]
    elif expr.is_Rational:
        out = _Jet.const(Fraction(int(expr.p), int(expr.q)))
    elif expr.is_Add:
        out = functools.reduce(lambda a, b: a + b, (_evaluate(a, base, memo) for a in expr.args))
    elif expr.is_Mul:
        out = functools.reduce(lambda a, b: a * b, (_evaluate(a, base, memo) for a in expr.args))
    elif expr.is_Pow:
        out = _evaluate(expr.base, base, memo).power(expr.exp)
    else:
        raise ValueError(f"cannot evaluate {expr!r} on jets")
    memo[expr] = out
    return out


def _field_jets(level, part, kind, load, e_val, point, tval):
    """The emitted profiles of one part as a 3D field on jets at (x, y, z, t) = (point, tval),
    radius e_val and speed SAMPLE_SPEED: u = c^(2 - n) [profile template]."""
    jx = [_Jet.var(point[i], i) for i in range(3)]
    jt = _Jet.var(tval, 3)
    rr = jx[0] * jx[0] + jx[1] * jx[1] + jx[2] * jx[2]
    rad = rr.sqrt()
    Tj = jt.scaled(Fraction(int(SAMPLE_SPEED.p), int(SAMPLE_SPEED.q)))
    ee = _Jet.const(e_val * e_val)
    Spj = ((rad + Tj) * (rad + Tj) + ee).sqrt()
    Smj = ((rad - Tj) * (rad - Tj) + ee).sqrt()
    base = {sig: Spj + Smj, pi_: Spj * Smj, s0: (rr + ee).sqrt(), r2: rr, T: Tj, eps: _Jet.const(e_val)}
    n = LEVELS.index(level) + 1
    scale = Fraction(int(SAMPLE_SPEED.p), int(SAMPLE_SPEED.q)) ** (2 - n)
    memo = {}
    which = "grab" if kind == "grab" else "affine"
    prof = [(_evaluate(a, base, memo) + _evaluate(b, base, memo)).scaled(scale)
            for a, b in zip(profiles(level, part, which), static_part(level, part, which))]
    if kind == "grab":
        f = [Fraction(int(v)) for v in load]
        rf = functools.reduce(lambda a, b: a + b, (jx[i].scaled(f[i]) for i in range(3)))
        return [prof[0].scaled(f[i]) + prof[1] * rf * jx[i] for i in range(3)]
    F = [[Fraction(int(load[i, j])) for j in range(3)] for i in range(3)]
    tr = sum(F[i][i] for i in range(3))
    Fr = [functools.reduce(lambda a, b: a + b, (jx[j].scaled(F[i][j]) for j in range(3))) for i in range(3)]
    Ftr = [functools.reduce(lambda a, b: a + b, (jx[j].scaled(F[j][i]) for j in range(3))) for i in range(3)]
    rFr = functools.reduce(lambda a, b: a + b, (jx[i] * Fr[i] for i in range(3)))
    return [prof[0] * Fr[i] + prof[1] * (Ftr[i] + jx[i].scaled(tr)) + prof[2] * rFr * jx[i] for i in range(3)]


def _source_xyz(level, part, kind, load, e_val):
    """The part's source at t > 0: c^2 4 pi L(t) {grad div | -curl curl}(g f), L = 0, 1, t (the
    field W_n = c^(2-n) Phi_n solves W_tt = c^2 lap W + 2 c^2 g L), and for the affine kinds its
    gradient contracted with F: b_i = sum_k d_k b^(j)_i F_jk."""
    g = newton_potential(sp.sqrt(x**2 + y**2 + z**2 + e_val**2)).subs(eps, e_val)
    L = {"impulse": 0, "step": 1, "ramp": t}[level]
    amp = SAMPLE_SPEED**2 * 4 * sp.pi * L

    def one(f):
        return _grad(_div(g * f)) if part == "pressure" else -_curl(_curl(g * f))

    if kind == "grab":
        return amp * one(load)
    cols = [one(sp.Matrix([1 if i == j else 0 for i in range(3)])) for j in range(3)]
    return amp * sp.Matrix([sum(sp.diff(cols[j][i], X[k]) * load[j, k] for j in range(3) for k in range(3))
                            for i in range(3)])


def _residuals(level, part, kind):
    """Exact residuals at the rational points of the part's wave equation
    (pressure: u_tt - c^2 grad div u - source, and curl u; shear: u_tt + c^2 curl curl u - source,
    and div u) and of its rest at t = 0 (u, and u_t less the impulse's kick), each of which must
    be 0."""
    load = SAMPLE_LOADS[kind]
    c2 = Fraction(int(SAMPLE_SPEED.p), int(SAMPLE_SPEED.q)) ** 2
    out = []
    for e_val, _rad, Tv, point in RATIONAL_POINTS:
        tval = Fraction(Tv) / Fraction(int(SAMPLE_SPEED.p), int(SAMPLE_SPEED.q))
        u = _field_jets(level, part, kind, load, Fraction(e_val), [Fraction(v) for v in point], tval)
        src = _source_xyz(level, part, kind, load, sp.Integer(e_val))
        at = {x: point[0], y: point[1], z: point[2], t: sp.Rational(tval.numerator, tval.denominator)}
        src = [sp.simplify(e.xreplace(at)) for e in src]
        d2 = lambda i, a, b: u[i].second(a, b)  # noqa: E731
        d1 = lambda i, a: u[i].c[1 + a]  # noqa: E731
        grad_div = [sum(d2(j, i, j) for j in range(3)) for i in range(3)]
        lap = [sum(d2(i, j, j) for j in range(3)) for i in range(3)]
        utt = [d2(i, 3, 3) for i in range(3)]
        if part == "pressure":
            res = [utt[i] - c2 * grad_div[i] for i in range(3)]
            extra = [d1(2, 1) - d1(1, 2), d1(0, 2) - d1(2, 0), d1(1, 0) - d1(0, 1)]   # curl u
        else:   # curl curl u = grad div u - lap u
            res = [utt[i] + c2 * (grad_div[i] - lap[i]) for i in range(3)]
            extra = [sum(d1(i, i) for i in range(3))]                                # div u
        out.extend(sp.Rational(v.numerator, v.denominator) - s for v, s in zip(res, src))
        out.extend(extra)
        # rest at t = 0: u = 0, and u_t = 0 except for the impulse, whose push starts the
        # material with the velocity the step's source gives (momentum = impulse)
        u0 = _field_jets(level, part, kind, load, Fraction(e_val), [Fraction(v) for v in point], Fraction(0))
        kick = [sp.Integer(0)] * 3
        if level == "impulse":
            at0 = {x: point[0], y: point[1], z: point[2], t: 0}
            kick = [sp.simplify(e.xreplace(at0)) for e in _source_xyz("step", part, kind, load, sp.Integer(e_val))]
        out.extend(u0[i].c[0] for i in range(3))
        out.extend(sp.Rational(u0[i].c[4].numerator, u0[i].c[4].denominator) - kick[i] for i in range(3))
    return out


def prove_fields_at_rational_points():
    """End to end, on the very expressions that are generated: every level, both parts, and
    grab, twist, scale and pinch solve their wave equations exactly at the rational points and
    start from rest (the impulse with its kick) at t = 0 there.

    Combined as in step 5 (u = kappa c_p^(2-n) U_p + c_s^(2-n) U_s, mu = 1 / (4 pi),
    rho = mu / c_s^2, kappa c_p^2 = c_s^2, curl U_p = 0, div U_s = 0) they solve the Navier
    equations under L(t) rho_eps f (`prove_potential_identity` gives the last identity).
    """
    for level in LEVELS:
        for part in PARTS:
            for kind in SAMPLE_LOADS:
                if any(v != 0 for v in _residuals(level, part, kind)):
                    return False
    return True


PROOFS = {
    "Newtonian potential: lap g = rho_eps": prove_newton_potential,
    "antiderivatives G1, G2, G3": prove_antiderivatives,
    "radial wave equation, rest at t = 0": prove_radial_wave,
    "symmetric form and chain rules": prove_chain_rules,
    "square roots of the generated code": prove_code_roots,
    "impulse, step and ramp levels": prove_levels,
    "potentials solve the Navier equations": prove_potential_identity,
    "radial profile assembly": prove_profile_assembly,
    "long-time limit is the static brush": prove_long_time_limit,
    "incompressible limit (nu = 1/2)": prove_incompressible_limit,
    "emitted fields at rational points": prove_fields_at_rational_points,
}


def run_proofs(verbose=True):
    ok = True
    for name, fn in PROOFS.items():
        t0 = time.perf_counter()
        res = bool(fn())
        ok &= res
        if verbose:
            print(f"  {'ok ' if res else 'FAIL'} {name} ({time.perf_counter() - t0:.1f} s)")
    return ok


# ---------------------------------------------------------------------------------------------
# Code generation
# ---------------------------------------------------------------------------------------------
HEADER = """\"\"\"GENERATED by `python -m brushes.kernels.dynamic_derive --write`. DO NOT EDIT BY HAND.

Elastodynamic brush kernels (de Goes & James, "Dynamic Kelvinlets", ACM Trans. Graph. 37(4), 2018),
derived and proved in `brushes/kernels/dynamic_derive.py`; `python -m brushes.kernels.generate --check`
(or `python -m brushes.kernels.dynamic_derive --check`) proves this file matches the derivation.

Profiles are per unit a = 1 / (4 pi mu), like `_generated.py`. A field is `static_c` times the static
regularized Kelvinlet (its long-time limit) plus wave terms: for one radius e and one front distance
T = c t, with S+- = sqrt((r +- T)^2 + e^2), pi_ = S+ S- = sqrt((T^2 - r^2)^2 + e^2 (2 (T^2 + r^2) + e^2))
and sig = S+ + S- = sqrt(2 (r^2 + T^2 + e^2 + pi_)) (no |r| needed), isig and ipi their inverses.
Shear fronts sit at ts[j] with coefficients ks[j] (c_s^(2-n) times the term's weight), pressure
fronts at tp[j] with kp[j] (kappa c_p^(2-n) times it); kernels sum over radii `eps[k]` (weights
`w[k]`). Level n = 1 impulse, 2 step, 3 ramp; the numba kernels are unrolled over one or two terms.
\"\"\"
import math

import numpy as np

LEVELS = ("impulse", "step", "ramp")
"""

_ee = sp.Symbol("ee", positive=True)


def _inverse_form(E):
    """E = N / (k sigma^a pi^b s0^c) written as N isig^a ipi^b is0^c / k, with eps^2 -> ee."""
    num, den = sp.fraction(sp.together(E))
    coeff, factors = sp.factor(den).as_coeff_mul()
    inv = {sig: isig, pi_: ipi, s0: is0}
    out = num / coeff
    for f in factors:
        b, e = f.as_base_exp()
        if b not in inv:
            raise ValueError(f"unexpected denominator factor {f}")
        out *= inv[b] ** e
    out = out.subs(eps, sp.sqrt(_ee))
    if out.has(sp.pi):
        raise ValueError("pi did not cancel")
    return out


def _code(expr):
    return sp.pycode(expr, fully_qualified_modules=False)


def _cse_lines(exprs, names, prefix):
    reps, reduced = sp.cse(exprs, symbols=sp.numbered_symbols(prefix), order="none")
    lines = [f"{sym} = {_code(val)}" for sym, val in reps]
    lines += [f"{n} = {_code(v)}" for n, v in zip(names, reduced)]
    return lines


def _names(kind):
    return ("pa", "pb") if kind == "grab" else ("pp", "pq", "ps")


def _totals(kind):
    return ("ta", "tb") if kind == "grab" else ("tp_", "tq", "ts_")


def _indented(lines, indent):
    return [" " * indent + ln for ln in lines]


@functools.lru_cache(maxsize=None)
def _static_lines(kind):
    beta_k = sp.Symbol("beta", positive=True)
    exprs = [_inverse_form(e.subs(derive.beta, beta_k)) for e in static_profiles(kind)]
    return tuple(_cse_lines(exprs, _names(kind), "h"))


@functools.lru_cache(maxsize=None)
def _wave_lines(level, kind, part):
    prefix = "u" if part == "shear" else "v"
    exprs = [_inverse_form(e) for e in profiles(level, part, kind)]
    return tuple(_cse_lines(exprs, _names(kind), prefix))


def _root_lines(T_expr, mod, share):
    """sigma and pi of one front from r^2, T and eps^2 alone (`prove_code_roots`), and their
    inverses from one division; with `share` that division also gives is0 = 1 / s0."""
    lines = [f"T = {T_expr}",
             "TT = T * T",
             "dd_ = TT - rr",
             f"pi_ = {mod}.sqrt(dd_ * dd_ + ee * (2.0 * (TT + rr) + ee))",
             f"sig = {mod}.sqrt(2.0 * (rr + TT + ee + pi_))"]
    if share:
        lines += ["sp_ = sig * pi_", "Q = 1.0 / (s0 * sp_)", "is0 = sp_ * Q", "q = s0 * Q"]
    else:
        lines += ["q = 1.0 / (sig * pi_)"]
    return lines + ["isig = pi_ * q", "ipi = sig * q"]


def _wave_block(level, kind, part, coef, rad_w):
    lines = list(_wave_lines(level, kind, part))
    return lines + [f"{tot} += {rad_w} * {coef} * {nm}" for tot, nm in zip(_totals(kind), _names(kind))]


def _static_block(kind, rad_w):
    lines = list(_static_lines(kind))
    return lines + [f"{tot} += {rad_w} * static_c * {nm}" for tot, nm in zip(_totals(kind), _names(kind))]


def _radius_body(level, kind, fronts, rad_w, mod, *, share):
    """Lines for one radius: the static part (not for the impulse) and every front
    [(part, T expression, coefficient expression)]; `share` merges the static part's division
    into the first front's."""
    static = level != "impulse"
    lines = [f"s0 = {mod}.sqrt(rr + ee)"] if static else []
    for i, (part, T_expr, coef) in enumerate(fronts):
        first = i == 0 and static
        lines += _root_lines(T_expr, mod, share and first)
        if first:
            if not share:
                lines.append("is0 = 1.0 / s0")
            lines += _static_block(kind, rad_w)
        lines += _wave_block(level, kind, part, coef, rad_w)
    return lines


_GRAB_HEAD = """\
    def {name}(points, center, move, eps, w, ts, ks, tp, kp, static_c, beta, out):
        n = points.shape[0]
        m0, m1, m2 = move[0], move[1], move[2]
        c0, c1, c2 = center[0], center[1], center[2]
{setup}
        for b in numba.prange((n + BLOCK - 1) // BLOCK):
            lo = b * BLOCK
            m = min(BLOCK, n - lo)
            rrv = np.empty(BLOCK)
            tav = np.empty(BLOCK)
            tbv = np.empty(BLOCK)
            for k in range(m):
                r0 = points[lo + k, 0] - c0
                r1 = points[lo + k, 1] - c1
                r2 = points[lo + k, 2] - c2
                rrv[k] = r0 * r0 + r1 * r1 + r2 * r2
            for k in range(m):
                rr = rrv[k]
                ta = 0.0
                tb = 0.0
{radii}
                tav[k] = ta
                tbv[k] = tb
            for k in range(m):
                r0 = points[lo + k, 0] - c0
                r1 = points[lo + k, 1] - c1
                r2 = points[lo + k, 2] - c2
                ta = tav[k]
                rm = (r0 * m0 + r1 * m1 + r2 * m2) * tbv[k]
                out[lo + k, 0] = ta * m0 + rm * r0
                out[lo + k, 1] = ta * m1 + rm * r1
                out[lo + k, 2] = ta * m2 + rm * r2
        return out
"""

_AFFINE_HEAD = """\
    def {name}(points, center, F, eps, w, ts, ks, tp, kp, static_c, beta, out):
        n = points.shape[0]
        tr = F[0, 0] + F[1, 1] + F[2, 2]
        c0, c1, c2 = center[0], center[1], center[2]
        F00, F01, F02 = F[0, 0], F[0, 1], F[0, 2]
        F10, F11, F12 = F[1, 0], F[1, 1], F[1, 2]
        F20, F21, F22 = F[2, 0], F[2, 1], F[2, 2]
{setup}
        for b in numba.prange((n + BLOCK - 1) // BLOCK):
            lo = b * BLOCK
            m = min(BLOCK, n - lo)
            rrv = np.empty(BLOCK)
            tpv = np.empty(BLOCK)
            tqv = np.empty(BLOCK)
            tsv = np.empty(BLOCK)
            for k in range(m):
                r0 = points[lo + k, 0] - c0
                r1 = points[lo + k, 1] - c1
                r2 = points[lo + k, 2] - c2
                rrv[k] = r0 * r0 + r1 * r1 + r2 * r2
            for k in range(m):
                rr = rrv[k]
                tp_ = 0.0
                tq = 0.0
                ts_ = 0.0
{radii}
                tpv[k] = tp_
                tqv[k] = tq
                tsv[k] = ts_
            for k in range(m):
                r0 = points[lo + k, 0] - c0
                r1 = points[lo + k, 1] - c1
                r2 = points[lo + k, 2] - c2
                tp_, tq, ts_ = tpv[k], tqv[k], tsv[k]
                f0 = F00 * r0 + F01 * r1 + F02 * r2
                f1 = F10 * r0 + F11 * r1 + F12 * r2
                f2 = F20 * r0 + F21 * r1 + F22 * r2
                g0 = F00 * r0 + F10 * r1 + F20 * r2 + tr * r0
                g1 = F01 * r0 + F11 * r1 + F21 * r2 + tr * r1
                g2 = F02 * r0 + F12 * r1 + F22 * r2 + tr * r2
                rfr = (r0 * f0 + r1 * f1 + r2 * f2) * ts_
                out[lo + k, 0] = tp_ * f0 + tq * g0 + rfr * r0
                out[lo + k, 1] = tp_ * f1 + tq * g1 + rfr * r1
                out[lo + k, 2] = tp_ * f2 + tq * g2 + rfr * r2
        return out
"""

#: Numbers of wave terms the numba kernels are unrolled for (a ramped load has two).
TERM_COUNTS = (1, 2)


def kernel_name(kind, level, K, terms, compressible):
    """Name of the numba kernel for `K` radii and `terms` wave terms (pressure part if compressible)."""
    return f"dyn_{kind}_{level}_{K}x{terms}{'_p' if compressible else ''}"


#: The same function's text, emitted into the generated file (the engine then needs no sympy).
_KERNEL_NAME_SOURCE = "\n" + inspect.getsource(kernel_name)


def _numba_kernels():
    counts = sorted({len(q) for q in derive.FALLOFF_RATIOS.values()})
    funcs, names = [], []
    for kind in ("grab", "affine"):
        for level in LEVELS:
            for compressible in (False, True):
                for K in counts:
                    for nt in TERM_COUNTS:
                        name = kernel_name(kind, level, K, nt, compressible)
                        setup = [f"        e_{k} = eps[{k}]\n        w_{k} = w[{k}]" for k in range(K)]
                        setup += [f"        ts_{j}, ks_{j}, tp_{j}, kp_{j} = ts[{j}], ks[{j}], tp[{j}], kp[{j}]"
                                  for j in range(nt)]
                        radii = []
                        for k in range(K):
                            fronts = []
                            for j in range(nt):
                                fronts.append(("shear", f"ts_{j}", f"ks_{j}"))
                                if compressible:
                                    fronts.append(("pressure", f"tp_{j}", f"kp_{j}"))
                            body = [f"ee = e_{k} * e_{k}"] + _radius_body(level, kind, fronts, f"w_{k}", "math",
                                                                           share=True)
                            radii += _indented(body, 16)
                        head = _GRAB_HEAD if kind == "grab" else _AFFINE_HEAD
                        text = (head.replace("{name}", name).replace("{setup}", "\n".join(setup))
                                .replace("{radii}", "\n".join(radii)))
                        funcs.append("    @numba.njit(**opts)\n" + text)
                        names.append(f"    {name!r}: {name},")
    return ("\n\ndef _numba_kernels():\n"
            '    """The numba backend, compiled lazily per kernel: parallel loops over points, radii and\n'
            '    wave terms unrolled; points go in blocks of BLOCK whose squared distances and profile\n'
            '    sums sit in contiguous local arrays, so the heavy loop vectorizes."""\n'
            "    import numba\n\n"
            "    BLOCK = 512\n"
            "    opts = dict(parallel=True, cache=True, fastmath=True, nogil=True)\n\n"
            + "\n".join(funcs) + "\n    return {\n" + "\n".join(names) + "\n    }\n")


def _numpy_profiles():
    """`np_profiles(rr, eps, w, ts, ks, tp, kp, static_c, beta, level, kind, compressible)`."""
    lines = ["", "", "def np_profiles(rr, eps, w, ts, ks, tp, kp, static_c, beta, level, kind, compressible):",
             '    """Sums over radii and wave terms of the profiles, vectorized over rr = |r|^2."""']
    first = True
    for kind in ("grab", "affine"):
        for level in LEVELS:
            lines.append(f"    {'if' if first else 'elif'} kind == {kind!r} and level == {level!r}:")
            first = False
            lines += [f"        {tot} = np.zeros_like(rr)" for tot in _totals(kind)]
            lines.append("        for k in range(eps.shape[0]):")
            body = ["ee = float(eps[k]) ** 2", "wk = float(w[k])"]
            if level != "impulse":
                body += ["s0 = np.sqrt(rr + ee)", "is0 = 1.0 / s0"] + _static_block(kind, "wk")
            body.append("for j in range(ts.shape[0]):")
            body += _indented(_root_lines("ts[j]", "np", False) + _wave_block(level, kind, "shear", "ks[j]", "wk"), 4)
            body.append("    if compressible:")
            body += _indented(_root_lines("tp[j]", "np", False) + _wave_block(level, kind, "pressure", "kp[j]", "wk"), 8)
            lines += _indented(body, 12)
            lines.append(f"        return {', '.join(_totals(kind))}")
    lines.append("    raise ValueError(f'no profiles for {kind!r} at level {level!r}')")
    return "\n".join(lines) + "\n"


_NUMPY_ASSEMBLY = """

def np_dyn_grab(points, center, move, eps, w, ts, ks, tp, kp, static_c, beta, out, level, compressible):
    r_ = np.subtract(points, center, dtype=np.float64)
    rr = np.einsum("ij,ij->i", r_, r_)
    ta, tb = np_profiles(rr, eps, w, ts, ks, tp, kp, static_c, beta, level, "grab", compressible)
    rm = (r_ @ move) * tb
    np.multiply(ta[:, None], move[None, :], out=out)
    out += rm[:, None] * r_
    return out


def np_dyn_affine(points, center, F, eps, w, ts, ks, tp, kp, static_c, beta, out, level, compressible):
    r_ = np.subtract(points, center, dtype=np.float64)
    rr = np.einsum("ij,ij->i", r_, r_)
    tp_, tq, ts_ = np_profiles(rr, eps, w, ts, ks, tp, kp, static_c, beta, level, "affine", compressible)
    tr = np.trace(F)
    fr = r_ @ F.T
    gr = r_ @ F + tr * r_
    rfr = np.einsum("ij,ij->i", r_, fr) * ts_
    out[...] = tp_[:, None] * fr + tq[:, None] * gr + rfr[:, None] * r_
    return out
"""


def generate():
    """The full text of `_dynamic_generated.py`."""
    return HEADER + "\n" + _KERNEL_NAME_SOURCE + _numpy_profiles() + _NUMPY_ASSEMBLY + _numba_kernels()


def generated_path():
    return os.path.join(os.path.dirname(os.path.abspath(__file__)), "_dynamic_generated.py")


def check_or_write(*, write, verbose=True):
    """Re-derive and prove; write `_dynamic_generated.py` (write=True, only if every proof holds)
    or compare it with the committed file. Returns True on success."""
    t0 = time.perf_counter()
    if verbose:
        print("dynamic proofs:")
    ok = run_proofs(verbose)
    return derive.publish(generated_path(), generate(), write=write, proved=ok, program="dynamic_derive",
                          t0=t0, verbose=verbose)


def main(argv=None):
    parser = argparse.ArgumentParser(prog="python -m brushes.kernels.dynamic_derive",
                                     description="Derive, prove and generate pliant's elastodynamic kernels.")
    group = parser.add_mutually_exclusive_group(required=True)
    group.add_argument("--check", action="store_true", help="re-derive and prove; fail if the generated file differs")
    group.add_argument("--write", action="store_true", help="re-derive, prove and write _dynamic_generated.py")
    args = parser.parse_args(argv)
    return 0 if check_or_write(write=args.write) else 1


if __name__ == "__main__":
    sys.exit(main())
